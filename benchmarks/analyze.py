"""Benchmark: ``analyze`` against the loop a user writes by hand, idle and under load.

For Gaussian and orthogonal weights at N = 512 and 1024 (L = 64, 4 draws, float64, tanh at
sigma_w = 1.05, sigma_b = 0.02) it times, per stage, the hand loop (sample the weights with
``jax.random``, QR with the sign fix for orthogonal ones; ``jit(jacfwd)`` over ``lax.scan``;
``jnp.linalg.svd``) and ``isoscope.analysis.analyze`` (which also predicts the spectrum and
measures the depth profile), first on an idle machine and then with one competing process
that spins NumPy matrix products (stopped afterwards; it also stops itself after
``--load-limit`` seconds or when this script exits).

Targets (issue 8): analyze within 1.2x of the hand loop for Gaussian weights and 1.5x for
orthogonal ones; under the competing process no stage of analyze slower than 3x its idle time.

Run: ``.venv/bin/python benchmarks/analyze.py [--sizes 512,1024] [--out benchmarks/analyze.json]``.
Compilation is excluded (one warm-up run of each); times are medians over ``--repeats`` runs.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import time

import jax
import jax.numpy as jnp
import numpy as np

import isoscope  # noqa: F401  (float64 on, thread policy for XLA)
from isoscope.analysis import analyze
from isoscope.spec import parse_spec
from isoscope.threads import thread_policy

SIGMA_W, SIGMA_B = 1.05, 0.02
STAGES = ("sampling", "jacobian", "svd", "profile", "theory", "total")
TARGET = {"gaussian": 1.2, "orthogonal": 1.5}
LOAD_TARGET = 3.0

# The competitor: one process of NumPy matrix products, single-threaded BLAS so that it is
# one busy process (one core's worth), ending at a deadline or when its parent is gone.
_SPIN = """
import os, sys, time
import numpy as np
deadline, parent = time.time() + float(sys.argv[1]), os.getppid()
a = np.random.default_rng(0).standard_normal((384, 384))
while time.time() < deadline and os.getppid() == parent:
    a = a @ a
    a /= np.abs(a).max()
"""


def _hand_stack(n: int, depth: int):
    """The hand-written network and its compiled Jacobian and SVD."""

    def layer(x, p):
        w, b = p
        return jnp.tanh(w @ x + b), None

    def forward(params, x):
        return jax.lax.scan(layer, x, params)[0]

    return jax.jit(jax.jacfwd(forward, argnums=1)), jax.jit(
        lambda m: jnp.linalg.svd(m, compute_uv=False)
    )


def hand_loop(weights: str, n: int, depth: int, draws: int, compiled) -> dict[str, float]:
    """One run of the loop a user writes; wall seconds per stage."""
    jacobian, svd = compiled
    t_all = time.perf_counter()
    out = {"sampling": 0.0, "jacobian": 0.0, "svd": 0.0}
    for i in range(draws):
        t = time.perf_counter()
        kw, kb, kx = jax.random.split(jax.random.PRNGKey(i), 3)
        z = jax.random.normal(kw, (depth, n, n))
        if weights == "gaussian":
            w = z * (SIGMA_W / n**0.5)
        else:
            q, r = jnp.linalg.qr(z)
            w = SIGMA_W * q * jnp.sign(jnp.diagonal(r, axis1=-2, axis2=-1))[..., None, :]
        b = SIGMA_B * jax.random.normal(kb, (depth, n))
        x = jax.random.normal(kx, (n,))
        jax.block_until_ready((w, b, x))
        out["sampling"] += time.perf_counter() - t
        t = time.perf_counter()
        j = jacobian((w, b), x).block_until_ready()
        out["jacobian"] += time.perf_counter() - t
        t = time.perf_counter()
        np.asarray(svd(j))
        out["svd"] += time.perf_counter() - t
    out["total"] = time.perf_counter() - t_all
    return out


def analyze_run(spec) -> dict[str, float]:
    """One run of ``analyze``; its own per-stage wall seconds."""
    return dict(analyze(spec).seconds)


def _median(runs: list[dict[str, float]]) -> dict[str, float]:
    return {k: statistics.median(r.get(k, 0.0) for r in runs) for k in STAGES if k in runs[0]}


def measure(weights: str, n: int, depth: int, draws: int, repeats: int) -> dict:
    spec = parse_spec(
        {
            "name": f"bench-{weights}-{n}",
            "network": {"width": n, "depth": depth, "activation": "tanh"},
            "init": {"weights": weights, "sigma_w": SIGMA_W, "sigma_b": SIGMA_B},
            "analysis": {"inputs": draws, "seed": 0, "dtype": "float64"},
        }
    )
    compiled = _hand_stack(n, depth)
    hand_loop(weights, n, depth, 1, compiled)  # compile
    analyze_run(spec)
    hand = _median([hand_loop(weights, n, depth, draws, compiled) for _ in range(repeats)])
    ours = _median([analyze_run(spec) for _ in range(repeats)])
    return {"hand": hand, "analyze": ours, "ratio": ours["total"] / hand["total"]}


def _competitor(limit: float) -> subprocess.Popen:
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", MKL_NUM_THREADS="1", OMP_NUM_THREADS="1")
    proc = subprocess.Popen([sys.executable, "-c", _SPIN, str(limit)], env=env)
    time.sleep(1.0)  # let it start spinning
    return proc


def _row(label: str, stages: dict[str, float]) -> str:
    return f"  {label:<22}" + "".join(f"{stages.get(k, float('nan')):>10.3f}" for k in STAGES)


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--out", default="benchmarks/analyze.json")
    p.add_argument("--sizes", default="512,1024")
    p.add_argument("--depth", type=int, default=64)
    p.add_argument("--draws", type=int, default=4)
    p.add_argument("--repeats", type=int, default=3)
    p.add_argument(
        "--load-limit",
        type=float,
        default=3600.0,
        help="seconds after which the competing process stops by itself",
    )
    p.add_argument("--no-load", action="store_true", help="skip the run under load")
    args = p.parse_args()
    sizes = [int(s) for s in args.sizes.split(",")]
    policy = thread_policy()
    print(
        f"L = {args.depth}, {args.draws} draws, float64, tanh; medians of {args.repeats}; "
        f"threads: BLAS {policy.blas}, XLA {policy.xla or 'default'} ({policy.source}); "
        f"{os.cpu_count()} cores"
    )
    print(f"  {'':<22}" + "".join(f"{k:>10}" for k in STAGES))
    conditions = ["idle"] if args.no_load else ["idle", "one busy process"]
    rows, failures = [], []
    for condition in conditions:
        proc = _competitor(args.load_limit) if condition != "idle" else None
        try:
            for weights in ("gaussian", "orthogonal"):
                for n in sizes:
                    r = measure(weights, n, args.depth, args.draws, args.repeats)
                    r.update(
                        weights=weights, N=n, L=args.depth, draws=args.draws, condition=condition
                    )
                    rows.append(r)
                    print(
                        f"{weights} N = {n}, {condition}: analyze / hand = {r['ratio']:.2f} "
                        f"(target {TARGET[weights]})",
                        flush=True,
                    )
                    print(_row("hand loop", r["hand"]))
                    print(_row("analyze", r["analyze"]), flush=True)
                    if r["ratio"] > TARGET[weights]:
                        failures.append(f"{weights} N = {n} {condition}: ratio {r['ratio']:.2f}")
        finally:
            if proc is not None:
                proc.terminate()
                proc.wait(timeout=30)
    if not args.no_load:
        print("under load / idle, per stage of analyze (target: every stage <= 3):")
        idle = {(r["weights"], r["N"]): r for r in rows if r["condition"] == "idle"}
        for r in rows:
            if r["condition"] == "idle":
                continue
            base = idle[(r["weights"], r["N"])]["analyze"]
            slow = {k: r["analyze"][k] / base[k] for k in STAGES if base.get(k, 0) > 0}
            r["slowdown_vs_idle"] = slow
            print(
                f"  {r['weights']:<10} N = {r['N']:<5}"
                + "".join(f" {k} {v:.2f}" for k, v in slow.items())
            )
            failures += [
                f"{r['weights']} N = {r['N']} under load: {k} x{v:.2f}"
                for k, v in slow.items()
                if v > LOAD_TARGET
            ]
    print("targets met" if not failures else "targets missed: " + "; ".join(failures))
    meta = {
        "jax": jax.__version__,
        "cores": os.cpu_count(),
        "blas_threads": policy.blas,
        "xla_threads": policy.xla,
        "repeats": args.repeats,
        "load": "one process of single-threaded NumPy matmuls",
        "targets_missed": failures,
    }
    with open(args.out, "w") as f:
        json.dump({"meta": meta, "rows": rows}, f, indent=2)
    print(f"wrote {args.out}")


if __name__ == "__main__":
    main()
