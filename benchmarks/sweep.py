"""Benchmark: ``isoscope sweep`` with 1 and 2 local workers against the loop a user writes by hand.

The grid: 10 x 10 points, sigma_w in 0.9 .. 1.6 and sigma_b in 0.02 .. 0.3, tanh with
orthogonal weights at N = 256, L = 64, 4 draws per point, float64 (a sigma_w x sigma_b scan
across the critical line).  In one run it times:

* ``sweep, 1 worker`` and ``sweep, 2 workers``: :func:`isoscope.sweep.run_sweep` into a fresh
  store, wall time from the call to the last committed point (worker start-up included).  Each
  point is what ``isoscope analyze`` computes: the spectrum, the infinite-width prediction and
  the depth profile (7 more predictions).  The two stores must hold the same numbers.
* ``hand loop``: what a user writes without isoscope's sweep: per point, the weights drawn with
  ``jax.random`` (Haar by QR with the sign fix), the network written as a Python function closed
  over them, ``jax.jit(jax.jacfwd(net))`` (a new closure, so XLA recompiles it for every draw),
  the singular values by ``numpy.linalg.svd``, and the infinite-width prediction at the full
  depth by ``isoscope.analysis.predict_spec`` (the same prediction each sweep point has; the
  hand loop has no depth profile, so it does less work than a sweep point).  It runs on the
  first ``--hand-points`` points (default 12) and is reported per point; the same loop without
  the prediction is reported beside it.

Targets (issue 10): 1 worker at least 5x the hand loop's points per second; 2 workers at least
1.6x one worker on this 2-core machine.

Run: ``.venv/bin/python benchmarks/sweep.py [--hand-points 12] [--out benchmarks/sweep.json]``.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sys
import tempfile
import time
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np

import isoscope  # noqa: F401  (float64 on)
from isoscope.analysis import plan_inputs, predict_spec
from isoscope.sweep import parse_grid, run_sweep
from isoscope.sweep.store import Store

N, L, DRAWS = 256, 64, 4
SIGMA_W = [round(float(v), 4) for v in np.linspace(0.9, 1.6, 10)]
SIGMA_B = [round(float(v), 4) for v in np.linspace(0.02, 0.3, 10)]
TARGET_HAND, TARGET_WORKERS = 5.0, 1.6


def grid():
    return parse_grid(
        {
            "name": "bench",
            "network": {"width": N, "depth": L, "activation": "tanh"},
            "init": {"weights": "orthogonal"},
            "analysis": {"inputs": DRAWS, "seed": 0},
            "grid": {"init.sigma_w": SIGMA_W, "init.sigma_b": SIGMA_B},
        },
        source="<benchmark grid>",
    )


def hand_point(sw: float, sb: float, seed: int, with_prediction: bool, spec=None) -> np.ndarray:
    """One point the way a user writes it by hand (see the module docstring)."""
    key = jax.random.PRNGKey(seed)
    values = []
    for i in range(DRAWS):
        kw, kb, kx = jax.random.split(jax.random.fold_in(key, i), 3)
        q, r = jnp.linalg.qr(jax.random.normal(kw, (L, N, N)))
        w = sw * q * jnp.sign(jnp.diagonal(r, axis1=-2, axis2=-1))[:, None, :]
        b = sb * jax.random.normal(kb, (L, N))
        x0 = jnp.tanh(jax.random.normal(kx, (N,)))

        def net(x, w=w, b=b):
            for layer in range(L):
                x = jnp.tanh(w[layer] @ x + b[layer])
            return x

        jac = jax.jit(jax.jacfwd(net))(x0)
        values.append(np.linalg.svd(np.asarray(jac), compute_uv=False))
    if with_prediction:
        predict_spec(spec, plan_inputs(spec)[0])
    return np.concatenate(values)


def timed_sweep(g, workers: int, folder: Path) -> tuple[float, Path]:
    store = folder / f"w{workers}.sqlite"
    t = time.perf_counter()
    summary = run_sweep(g, store, workers=workers)
    seconds = time.perf_counter() - t
    assert summary.computed == len(g.points) and summary.failed == 0, summary
    return seconds, store


def numbers(store: Path) -> dict:
    with Store.reader(store) as st:
        return {
            p.key: {k: v for k, v in p.numbers.items() if not k.startswith("seconds.")}
            for p in st.points()
        }


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--hand-points", type=int, default=12)
    ap.add_argument("--out", default=str(Path(__file__).with_suffix(".json")))
    args = ap.parse_args()
    g = grid()
    points = len(g.points)
    with tempfile.TemporaryDirectory(prefix="isoscope-bench-") as tmp:
        one, store1 = timed_sweep(g, 1, Path(tmp))
        print(
            f"sweep, 1 worker:  {points} points in {one:.1f} s = {points / one:.3f} points/s",
            flush=True,
        )
        two, store2 = timed_sweep(g, 2, Path(tmp))
        print(
            f"sweep, 2 workers: {points} points in {two:.1f} s = {points / two:.3f} points/s",
            flush=True,
        )
        same = numbers(store1) == numbers(store2)
    subset = g.points[: args.hand_points]
    hand_point(SIGMA_W[0], SIGMA_B[0], 0, False)  # import and first-call costs, not counted
    t = time.perf_counter()
    for p in subset:
        hand_point(p.spec.init.sigma_w, p.spec.init.sigma_b, 0, True, p.spec)
    hand = (time.perf_counter() - t) / len(subset)
    t = time.perf_counter()
    for p in subset:
        hand_point(p.spec.init.sigma_w, p.spec.init.sigma_b, 0, False)
    hand_bare = (time.perf_counter() - t) / len(subset)
    print(
        f"hand loop: {hand:.2f} s per point ({1 / hand:.3f} points/s) with the prediction, "
        f"{hand_bare:.2f} s without (mean of {len(subset)} points)",
        flush=True,
    )
    rates = {
        "sweep_1_worker": points / one,
        "sweep_2_workers": points / two,
        "hand_loop": 1 / hand,
        "hand_loop_without_prediction": 1 / hand_bare,
    }
    ratio_hand = rates["sweep_1_worker"] / rates["hand_loop"]
    ratio_bare = rates["sweep_1_worker"] / rates["hand_loop_without_prediction"]
    ratio_workers = rates["sweep_2_workers"] / rates["sweep_1_worker"]
    print(
        f"1 worker / hand loop: {ratio_hand:.2f}x (target {TARGET_HAND}x: "
        f"{'met' if ratio_hand >= TARGET_HAND else 'MISSED'}); against the hand loop without "
        f"the prediction {ratio_bare:.2f}x"
    )
    print(
        f"2 workers / 1 worker: {ratio_workers:.2f}x (target {TARGET_WORKERS}x: "
        f"{'met' if ratio_workers >= TARGET_WORKERS else 'MISSED'})"
    )
    print(f"1 and 2 workers stored the same numbers: {same}")
    result = {
        "grid": {
            "sigma_w": SIGMA_W,
            "sigma_b": SIGMA_B,
            "width": N,
            "depth": L,
            "draws": DRAWS,
            "activation": "tanh",
            "weights": "orthogonal",
        },
        "points": points,
        "hand_points": len(subset),
        "seconds": {"sweep_1_worker": one, "sweep_2_workers": two},
        "points_per_second": rates,
        "ratio_1_worker_to_hand_loop": ratio_hand,
        "ratio_1_worker_to_hand_loop_without_prediction": ratio_bare,
        "ratio_2_workers_to_1": ratio_workers,
        "same_numbers": same,
        "targets": {"hand_loop": TARGET_HAND, "workers": TARGET_WORKERS},
        "machine": {
            "cores": len(os.sched_getaffinity(0)),
            "python": platform.python_version(),
            "jax": jax.__version__,
        },
    }
    Path(args.out).write_text(json.dumps(result, indent=2) + "\n", encoding="utf-8")
    print(f"wrote {args.out}")
    return 0 if same else 1


if __name__ == "__main__":
    sys.exit(main())
