"""Benchmark: the reach routes at scale, each case in its own process (peak memory per case).

* matrix-free: a plain tanh stack with Gaussian weights, L = 16, float32, at N = 2048, 4096,
  8192 (``--mf-widths``): drawing the weights plus :func:`isoscope.matrix_free.lanczos_quadrature`
  (8 probes x 80 steps), beside the dense route (``jax.jacfwd`` as one scan, then the SVD) at
  the widths in ``--dense-widths``; beyond those the dense time is extrapolated with its
  N^3 law from the largest measured width and labelled "extrapolated".
* deep: a plain tanh stack, N = 128, float64, at L = 1,000 and 10,000 (``--deep-depths``):
  :func:`isoscope.jacobian.stable_log_singular_values` beside the loop a user writes by hand,
  ``jax.jit(jax.jacfwd(apply))`` of the whole network followed by ``numpy.linalg.svd`` (which
  is not accurate there, but is the cost to beat).

Every case runs in a fresh Python process; its wall time excludes the first (compiling) call
only where stated, and its peak resident memory is ``ru_maxrss`` of that process.

Targets (issue 11): matrix-free at N = 8192 within 6 GB peak and at least 10x faster than the
dense route there; the deep route at most 4x the cost of plain ``jacfwd`` at the same size.

Run: ``.venv/bin/python benchmarks/scale.py [--mf-widths 2048,4096,8192] [--dense-widths 1024,2048]
[--deep-depths 1000,10000] [--out benchmarks/scale.json]``.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import textwrap
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

CHILD = textwrap.dedent("""
    import json, resource, sys, time
    import jax, jax.numpy as jnp, numpy as np
    jax.config.update("jax_enable_x64", True)
    from isoscope import jacobian as jac, matrix_free, network as nw
    kind, n, depth = sys.argv[1], int(sys.argv[2]), int(sys.argv[3])
    dtype = jnp.float32 if kind in ("mf", "dense") else jnp.float64
    net = nw.plain_stack(n, depth, "tanh", weights="gaussian", sigma_w=1.1, sigma_b=0.05)
    t0 = time.perf_counter()
    params = jax.block_until_ready(net.init(jax.random.PRNGKey(0), dtype))
    x = 0.4 * jax.random.normal(jax.random.PRNGKey(1), (n,), dtype)
    sample = time.perf_counter() - t0
    def run():
        if kind == "mf":
            r = matrix_free.lanczos_quadrature(net, params, x, jax.random.PRNGKey(2))
            return float(matrix_free.quadrature_summary(r)["m1"])
        if kind == "dense":
            j = jac.dense_jacobian(net, params, x)
            return float(np.mean(np.linalg.svd(np.asarray(j), compute_uv=False) ** 2))
        if kind == "deep":
            return float(np.mean(jac.stable_log_singular_values(net, params, x).log_s))
        f = jax.jit(jax.jacfwd(net.apply, argnums=1))          # the hand-written loop
        j = np.asarray(f(params, x))
        return float(np.mean(np.log(np.linalg.svd(j, compute_uv=False))))
    t0 = time.perf_counter(); value = run(); first = time.perf_counter() - t0
    again = None
    if kind in ("deep", "jacfwd"):
        t0 = time.perf_counter(); run(); again = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    print(json.dumps({"kind": kind, "width": n, "depth": depth, "sampling_s": sample,
                      "first_s": first, "again_s": again, "peak_bytes": peak, "value": value}))
""")


def _case(kind: str, n: int, depth: int) -> dict:
    run = subprocess.run(
        [sys.executable, "-c", CHILD, kind, str(n), str(depth)],
        capture_output=True,
        text=True,
        cwd=ROOT,
    )
    if run.returncode != 0:
        return {"kind": kind, "width": n, "depth": depth, "error": run.stderr.strip()[-400:]}
    return json.loads(run.stdout.strip().splitlines()[-1])


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--mf-widths", default="2048,4096,8192")
    ap.add_argument("--dense-widths", default="1024,2048")
    ap.add_argument("--deep-depths", default="1000,10000")
    ap.add_argument("--out", default=str(ROOT / "benchmarks" / "scale.json"))
    a = ap.parse_args()
    widths = [int(v) for v in a.mf_widths.split(",") if v]
    dense_widths = [int(v) for v in a.dense_widths.split(",") if v]
    rows = []
    dense = {n: _case("dense", n, 16) for n in dense_widths}
    ref_n = max((n for n in dense if "error" not in dense[n]), default=None)
    for n in widths:
        mf = _case("mf", n, 16)
        total = mf.get("sampling_s", 0) + mf.get("first_s", 0)
        if n in dense and "error" not in dense[n]:
            d, how = dense[n]["sampling_s"] + dense[n]["first_s"], "measured"
        elif ref_n is not None:
            d0 = dense[ref_n]["sampling_s"] + dense[ref_n]["first_s"]
            d, how = d0 * (n / ref_n) ** 3, f"extrapolated (N^3 from N = {ref_n})"
        else:
            d, how = None, "not run"
        rows.append(
            {
                "route": "matrix-free",
                "width": n,
                "depth": 16,
                "seconds": total,
                "peak_GB": mf.get("peak_bytes", 0) / 1e9,
                "dense_seconds": d,
                "dense": how,
                "speed_up": (d / total) if d and total else None,
                "error": mf.get("error"),
            }
        )
    for n, d in dense.items():
        rows.append(
            {
                "route": "dense",
                "width": n,
                "depth": 16,
                "seconds": d.get("sampling_s", 0) + d.get("first_s", 0),
                "peak_GB": d.get("peak_bytes", 0) / 1e9,
                "error": d.get("error"),
            }
        )
    for depth in [int(v) for v in a.deep_depths.split(",") if v]:
        deep, plain = _case("deep", 128, depth), _case("jacfwd", 128, depth)
        rows.append(
            {
                "route": "deep",
                "width": 128,
                "depth": depth,
                "seconds": deep.get("again_s"),
                "first_s": deep.get("first_s"),
                "peak_GB": deep.get("peak_bytes", 0) / 1e9,
                "jacfwd_seconds": plain.get("again_s"),
                "jacfwd_first_s": plain.get("first_s"),
                "ratio": (deep["again_s"] / plain["again_s"])
                if deep.get("again_s") and plain.get("again_s")
                else None,
                "error": deep.get("error") or plain.get("error"),
            }
        )
    for r in rows:
        print(json.dumps(r))
    Path(a.out).write_text(json.dumps(rows, indent=1) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
