"""Benchmark: dense Jacobian by jax.jacfwd against a plain matrix product, on this machine.

For N = 256, 512, 1024 and L = 64, float32 and float64, prints and writes as JSON:
compile time, Jacobian time (median of repeats), its FLOP rate (2 L N^3 flops) as a ratio to
an N x N matrix product timed in the same run, the SVD time, and peak resident memory.
Target (issue 2): ratio >= 0.5 at N = 1024.

Run: ``.venv/bin/python benchmarks/jacobian.py [--out benchmarks/jacobian.json]``.
"""

from __future__ import annotations

import argparse
import json
import resource
import time

import jax
import jax.numpy as jnp

import isoscope  # noqa: F401  (float64 on)
from _timing import median_time  # benchmarks/ is on sys.path when a script runs
from isoscope import jacobian as jac
from isoscope.network import plain_stack


def run_case(n: int, depth: int, dtype) -> dict:
    net = plain_stack(n, depth, "tanh", weights="orthogonal", sigma_w=1.05, sigma_b=0.02)
    params = net.init(jax.random.PRNGKey(0), dtype)
    x = jax.random.normal(jax.random.PRNGKey(1), (n,), dtype)
    t = time.perf_counter()
    jac.dense_jacobian(net, params, x).block_until_ready()
    first = time.perf_counter() - t
    repeats = 5 if n <= 512 else 3
    t_jac = median_time(lambda: jac.dense_jacobian(net, params, x).block_until_ready(), repeats)
    a = jax.random.normal(jax.random.PRNGKey(2), (n, n), dtype)
    b = jax.random.normal(jax.random.PRNGKey(3), (n, n), dtype)
    mm = jax.jit(jnp.matmul)
    mm(a, b).block_until_ready()
    t_mm = median_time(lambda: mm(a, b).block_until_ready(), 20)
    j = jac.dense_jacobian(net, params, x)
    svd = jax.jit(lambda m: jnp.linalg.svd(m, compute_uv=False))
    svd(j).block_until_ready()
    t_svd = median_time(lambda: svd(j).block_until_ready(), repeats)
    jac_rate = 2.0 * depth * n**3 / t_jac
    mm_rate = 2.0 * n**3 / t_mm
    return {
        "N": n,
        "L": depth,
        "dtype": jnp.dtype(dtype).name,
        "compile_s": first - t_jac,
        "jacobian_s": t_jac,
        "jacobian_gflops": jac_rate / 1e9,
        "matmul_gflops": mm_rate / 1e9,
        "ratio_to_matmul": jac_rate / mm_rate,
        "svd_s": t_svd,
        "peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0,
    }


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--out", default="benchmarks/jacobian.json")
    p.add_argument("--sizes", default="256,512,1024")
    p.add_argument("--depth", type=int, default=64)
    args = p.parse_args()
    rows = []
    head = f"{'N':>5} {'dtype':>8} {'compile s':>9} {'jac s':>8} {'GFLOP/s':>8} {'matmul':>8} {'ratio':>6} {'svd s':>7} {'RSS MiB':>8}"
    print(head)
    for n in (int(s) for s in args.sizes.split(",")):
        for dtype in (jnp.float32, jnp.float64):
            r = run_case(n, args.depth, dtype)
            rows.append(r)
            print(
                f"{r['N']:>5} {r['dtype']:>8} {r['compile_s']:>9.3f} {r['jacobian_s']:>8.3f} "
                f"{r['jacobian_gflops']:>8.1f} {r['matmul_gflops']:>8.1f} {r['ratio_to_matmul']:>6.2f} "
                f"{r['svd_s']:>7.3f} {r['peak_rss_mib']:>8.0f}",
                flush=True,
            )
    meta = {
        "jax": jax.__version__,
        "device": jax.devices()[0].platform,
        "note": "peak_rss_mib is the process high-water mark so far (monotone over the run)",
    }
    with open(args.out, "w") as f:
        json.dump({"meta": meta, "rows": rows}, f, indent=2)
    print(f"wrote {args.out}")


if __name__ == "__main__":
    main()
