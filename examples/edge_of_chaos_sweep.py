"""Wind-farm yaw controller: where should sigma_w sit for a deep tanh network?

The team behind the (invented) Gale-9 yaw controller trains a plain tanh network with
Haar-orthogonal weights and a small bias.  Before training they sweep the weight scale
sigma_w across the critical value sigma_w* (where mean-field theory puts chi_1 = 1, the
edge of chaos) and measure the Jacobian spectrum at each point.

Run:  python examples/edge_of_chaos_sweep.py            (about half a minute on a laptop CPU)
      python examples/edge_of_chaos_sweep.py --depth 64 (deeper: the optimum sharpens)

It prints one row per sigma_w: the predicted chi_1 and phase, the predicted gain
m1 = chi_1^L, and the measured gain, spread (std ln s), isometry score, shape score (the
isometry score after dividing out the gain) and verdict.
"""

from __future__ import annotations

import argparse

from isoscope.analysis import analyze
from isoscope.spec import parse_spec
from isoscope.theory import mean_field

FACTORS = (0.85, 1.0, 1.15)  # sigma_w / sigma_w*


def sweep(width: int, depth: int, sigma_b: float, inputs: int, seed: int) -> list[dict]:
    """Measure the design at sigma_w = f * sigma_w*(sigma_b) for each factor f in FACTORS."""
    critical = mean_field.critical_point("tanh", sigma_b)
    rows = []
    for f in FACTORS:
        sigma_w = f * critical.sigma_w
        mf = mean_field.mean_field("tanh", sigma_w, sigma_b)
        spec = parse_spec(
            {
                "name": f"gale9-sigma-w-{sigma_w:.3f}",
                "network": {"width": width, "depth": depth, "activation": "tanh"},
                "init": {"weights": "orthogonal", "sigma_w": sigma_w, "sigma_b": sigma_b},
                "analysis": {"inputs": inputs, "seed": seed},
            }
        )
        a = analyze(spec)
        rows.append(
            {
                "factor": f,
                "sigma_w": sigma_w,
                "chi1": mf.chi1,
                "phase": mf.phase,
                "predicted_m1": mf.chi1**depth,
                "m1": a.score.gain,
                "log_s_std": a.score.log_s_std,
                "isometry": a.score.isometry,
                "shape": a.score.shape_score,
                "verdict": a.score.verdict,
            }
        )
    return rows


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--width", type=int, default=64)
    parser.add_argument("--depth", type=int, default=24)
    parser.add_argument("--sigma-b", type=float, default=0.01)
    parser.add_argument("--inputs", type=int, default=2)
    parser.add_argument("--seed", type=int, default=9)
    args = parser.parse_args(argv)
    critical = mean_field.critical_point("tanh", args.sigma_b)
    print(
        f"tanh, orthogonal weights, width {args.width}, depth {args.depth}, sigma_b = {args.sigma_b:g}: "
        f"critical sigma_w* = {critical.sigma_w:.5f} (q* = {critical.q_star:.4g})"
    )
    print(
        f"{'sigma_w/sigma_w*':>16} {'sigma_w':>8} {'chi_1':>8} {'phase':>9} {'m1 theory':>10} "
        f"{'m1 measured':>11} {'std ln s':>8} {'isometry':>8} {'shape':>6}  verdict"
    )
    rows = sweep(args.width, args.depth, args.sigma_b, args.inputs, args.seed)
    for r in rows:
        print(
            f"{r['factor']:>16.2f} {r['sigma_w']:>8.4f} {r['chi1']:>8.4f} {r['phase']:>9} "
            f"{r['predicted_m1']:>10.4g} {r['m1']:>11.4g} {r['log_s_std']:>8.3f} {r['isometry']:>8.3f} "
            f"{r['shape']:>6.3f}  {r['verdict']}"
        )
    best = max(rows, key=lambda r: r["isometry"])
    print(
        f"best isometry score {best['isometry']:.3f} at sigma_w/sigma_w* = {best['factor']:.2f} "
        f"(chi_1 = {best['chi1']:.4f})"
    )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
