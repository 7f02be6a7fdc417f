"""The ``isoscope`` command.

Exit codes: 0 success, 2 bad input (the message names the file, key, value and what is
allowed), 1 internal error, 130 interrupted (Ctrl-C; no output folder is changed), 141 the
reader of stdout went away (a broken pipe, as in ``isoscope critical ... | head -2``).
``--json`` sends the machine-readable result to stdout and keeps everything else on stderr;
without ``--out`` it writes nothing to disk.
"""

from __future__ import annotations

import argparse
import contextlib
import os
import re
import signal
import sys
import time
import traceback
from importlib import resources
from pathlib import Path
from typing import NoReturn

from isoscope.errors import InputError, SolverError, TheoryError, did_you_mean

__all__ = ["main", "build_parser"]

DEMO_TITLE = "isoscope demo: initializing the Heron-7 greenhouse controller"
DEMO_INTRO = (
    "A team building the climate controller of a fleet of research greenhouses trains a "
    "64-layer, 256-wide fully connected policy (sensor readings in, vent, heater and misting "
    "commands out). Before paying for training runs they compare four initializations by the "
    "singular values of the input-output Jacobian at initialization: a design whose singular "
    "values all sit near 1 passes gradients through every layer undistorted."
)


def _demo_specs() -> dict[str, str]:
    folder = resources.files("isoscope") / "scenarios"
    return {
        p.name[:-5]: p.read_text(encoding="utf-8")
        for p in sorted(folder.iterdir(), key=lambda p: p.name)
        if p.name.endswith(".toml")
    }


class _Progress:
    """A one-line progress display ``[#####.....] 3/10 draws, 1.2/s, 6 s left`` on ``stream``.

    Drawn only when ``stream`` is a terminal, and only once ``min_seconds`` have passed (a
    short run shows nothing); silent when piped.  Call it as ``progress(done, total)``.
    """

    def __init__(self, stream, unit: str, min_seconds: float = 1.0):
        self.stream, self.unit, self.min_seconds = stream, unit, min_seconds
        self.on = bool(getattr(stream, "isatty", lambda: False)())
        self.start, self.drawn = time.perf_counter(), False

    def __call__(self, done: int, total: int) -> None:
        elapsed = time.perf_counter() - self.start
        if not self.on or elapsed < self.min_seconds:
            return
        rate = done / elapsed if elapsed > 0 else 0.0
        left = (total - done) / rate if rate > 0 else float("inf")
        filled = int(30 * done / max(total, 1))
        left_text = (
            "?"
            if left == float("inf")
            else (f"{left:.0f} s" if left < 120 else f"{left / 60:.0f} min")
        )
        self.stream.write(
            f"\r[{'#' * filled}{'.' * (30 - filled)}] {done}/{total} {self.unit}, "
            f"{rate:.3g}/s, {left_text} left "
        )
        self.stream.flush()
        self.drawn = True

    def close(self) -> None:
        """End the line (when something was drawn)."""
        if self.drawn:
            self.stream.write("\n")
            self.stream.flush()
            self.drawn = False


# flag -> spec key, for the overrides `analyze` lays over its spec
_ANALYSIS_FLAGS = (
    ("seed", "analysis", "seed"),
    ("inputs", "analysis", "inputs"),
    ("dtype", "analysis", "dtype"),
    ("width", "network", "width"),
    ("depth", "network", "depth"),
    ("sigma_w", "init", "sigma_w"),
    ("sigma_b", "init", "sigma_b"),
)


def _spec_with_flags(args, flags):
    """``load_spec(args.spec)`` with the given flags laid over its keys, validated as spec keys."""
    from isoscope.spec import load_spec, parse_spec

    spec = load_spec(args.spec)
    data = spec.to_dict()
    if not _lay_flags(data, args, flags):
        return spec
    return parse_spec(data, source=f"{args.spec} with command-line flags")


def _lay_flags(data: dict, args, flags) -> dict:
    """Write every flag that was given into the spec mapping ``data`` (``flag -> section.key``);
    returns the given flags and their values."""
    given = {}
    for flag, section, key in flags:
        value = getattr(args, flag, None)
        if value is not None:
            data.setdefault(section, {})[key] = value
            given[flag] = value
    return given


@contextlib.contextmanager
def _reserved(out):
    """Reserve the output folder ``out`` before computing (fail early), yield the reservation
    (``None`` when nothing goes to disk), and abort it if anything below raises."""
    from isoscope.folders import reserve

    target = reserve(out) if out is not None else None
    try:
        yield target
    except BaseException:
        if target is not None:
            target.abort()
        raise


def _cmd_analyze(args) -> int:
    from isoscope import budget
    from isoscope.folders import safe_folder_name

    spec = _spec_with_flags(args, _ANALYSIS_FLAGS)
    if args.out is not None:
        out = args.out
    elif args.json:
        out = None  # --json alone: the result goes to stdout, nothing to disk
    else:
        out = Path("isoscope-out") / safe_folder_name(spec.name)
    budget.check(spec)  # before anything is allocated
    with _reserved(out) as target:
        from isoscope.analysis import analyze
        from isoscope.report import result_dict, summary_table, to_json, write_analysis_folder

        bar = _Progress(sys.stderr, "draws")
        try:
            result = analyze(spec, progress=bar)
        finally:
            bar.close()
        if target is not None:
            write_analysis_folder(result, target)
    if args.json:
        sys.stdout.write(to_json(result_dict(result)))
    else:
        print(summary_table([result]))
        print(f"\nwrote {out}/report.html, result.json and figures")
    return 0


def _cmd_demo(args) -> int:
    """The built-in scenario through ``compare``: four designs ranked in one report folder."""
    import tomllib

    from isoscope.spec import parse_spec

    texts = _demo_specs()
    specs = [
        parse_spec(tomllib.loads(text), source=f"<built-in {name}.toml>")
        for name, text in texts.items()
    ]
    policy = "each design at its own spec's analysis.seed"
    done = _run_comparison(
        specs,
        args.out,
        {s.name: t for s, t in zip(specs, texts.values())},
        policy,
        args.json,
        title=DEMO_TITLE,
        intro=DEMO_INTRO,
    )
    _print_comparison(
        done,
        policy,
        args.json,
        f"wrote {args.out}/report.html (open it in a browser); the four specs are in "
        f"{args.out}/specs/",
    )
    return 0


def _compare_specs(args):
    """The specs of ``compare``, each checked before anything runs: every file exists and parses,
    at least two designs, no two share a name or an output sub-folder."""
    from isoscope.folders import safe_folder_name
    from isoscope.spec import load_spec, parse_spec

    if len(args.specs) < 2:
        raise InputError(
            f"compare received {len(args.specs)} spec",
            expected="two or more SPEC.toml files",
            hint="use `isoscope analyze` for one design",
        )
    specs: list = []
    seen: dict[str, str] = {}
    folders: dict[str, tuple[str, str]] = {}
    for path in args.specs:
        spec = load_spec(path)
        data = spec.to_dict()
        if _lay_flags(data, args, (("seed", "analysis", "seed"), ("inputs", "analysis", "inputs"))):
            spec = parse_spec(data, source=f"{path} with command-line flags")
        if spec.name in seen:
            raise InputError(
                f"{path} and {seen[spec.name]} both name their design {spec.name!r}",
                expected="a distinct name per design (the name labels its row, "
                "its figures and its sub-folder)",
                hint="change `name = ...` in one of them",
                file=path,
                key="name",
            )
        folder = safe_folder_name(spec.name).casefold()  # case-insensitive file systems too
        if folder in folders:
            raise InputError(
                f"the names {spec.name!r} ({path}) and {folders[folder][0]!r} "
                f"({folders[folder][1]}) give the same folder name {folder!r}",
                expected="names whose folders differ also on a file system that ignores case",
                file=path,
                key="name",
            )
        seen[spec.name] = path
        folders[folder] = (spec.name, path)
        specs.append(spec)
    return specs


def _cmd_compare(args) -> int:
    specs = _compare_specs(args)
    out = args.out if args.out is not None else (None if args.json else "isoscope-out/comparison")
    texts = {s.name: Path(p).read_text(encoding="utf-8") for s, p in zip(specs, args.specs)}
    policy = (
        f"every design at seed {args.seed} (--seed)"
        if args.seed is not None
        else "each design at its own spec's analysis.seed"
    )
    done = _run_comparison(specs, out, texts, policy, args.json)
    _print_comparison(
        done,
        policy,
        args.json,
        None
        if out is None
        else f"wrote {out}/report.html, comparison.json, figures and one folder per design",
    )
    return 0


def _print_comparison(done, policy, as_json, wrote):
    """``comparison.json`` on stdout, or the terminal table and the line saying what was written;
    ``done`` is what :func:`_run_comparison` returns (analyses, limits, ranking)."""
    analyses, limits, ranking = done
    if as_json:
        from isoscope.report import comparison_dict, to_json

        sys.stdout.write(to_json(comparison_dict(analyses, limits, ranking, policy)))
        return
    from isoscope.report import comparison_table

    print(comparison_table(analyses, limits, ranking))
    if wrote is not None:
        print(f"\n{wrote}")


def _run_comparison(specs, out, texts, policy, quiet, title="isoscope comparison", intro=""):
    """Analyse every spec (as ``analyze`` would), estimate each trainable depth, rank, and write
    the folder when ``out`` is given (reserved before computing; untouched on failure).  Every
    spec's memory estimate is checked first."""
    from isoscope import budget
    from isoscope.analysis import analyze
    from isoscope.recommend import rank, trainable_depth
    from isoscope.report import write_compare_folder

    for spec in specs:
        budget.check(spec)
    with _reserved(out) as target:
        analyses, limits = [], []
        for i, spec in enumerate(specs, 1):
            if sys.stderr.isatty() and not quiet:
                print(f"[{i}/{len(specs)}] {spec.name}", file=sys.stderr, flush=True)
            analyses.append(analyze(spec))
            limits.append(trainable_depth(spec, plan=analyses[-1].inputs))
        ranking = rank(analyses, limits)
        if target is not None:
            write_compare_folder(
                analyses,
                limits,
                ranking,
                policy,
                target,
                spec_texts=texts,
                title=title,
                intro=intro,
            )
    return analyses, limits, ranking


def _positive(flag: str, value, kind=int):
    if value is None:
        return None
    ok = (value >= 1) if kind is int else (value > 0 and value == value and value != float("inf"))
    if not ok:
        raise InputError(
            f"{flag} {value!r} is not allowed",
            expected="a whole number >= 1" if kind is int else "a positive finite number",
        )
    return value


def _cmd_recommend(args) -> int:
    import math

    from isoscope import budget
    from isoscope.activations import get_activation
    from isoscope.recommend import recommend

    try:
        act = get_activation(args.activation)
    except (KeyError, ValueError) as e:
        raise InputError(str(e), expected="a registered activation name") from None
    _positive("--depth", args.depth)
    _positive("--width", args.width)
    _positive("--inputs", args.inputs)
    _positive("--target-spread", args.target_spread, float)
    if args.sigma_b is not None and not (math.isfinite(args.sigma_b) and args.sigma_b >= 0):
        raise InputError(
            f"--sigma-b {args.sigma_b!r} is not allowed", expected="a finite scale >= 0"
        )
    if args.family not in ("plain", "residual"):
        raise InputError(
            f"--family {args.family!r} is not allowed",
            expected="plain or residual",
            hint=did_you_mean(args.family, ("plain", "residual")),
        )
    from isoscope.spec import SEED_MAX

    if not 0 <= args.seed <= SEED_MAX:
        raise InputError(
            f"--seed {args.seed} is out of range", expected="an integer from 0 to 2^64 - 1"
        )
    budget.check(_budget_spec(act.name, args))
    out = args.out
    with _reserved(out) as target:
        bar = _Progress(sys.stderr, "candidates measured")
        try:
            rec = recommend(
                act.name,
                args.depth,
                args.width,
                args.family,
                args.sigma_b,
                args.target_spread,
                args.inputs,
                args.seed,
                progress=bar,
            )
        finally:
            bar.close()
        if target is not None:
            from isoscope.report import write_recommend_folder

            write_recommend_folder(rec, target)
    if args.json:
        from isoscope.report import recommendation_dict, to_json

        sys.stdout.write(to_json(recommendation_dict(rec)))
    else:
        from isoscope.report import recommendation_text

        print(recommendation_text(rec))
        if out is not None:
            print(f"\nwrote {out}/report.html, recommendation.json and recommended.toml")
    return 0


def _budget_spec(activation: str, args):
    """The largest design ``recommend`` will measure (for the memory check before it starts)."""
    from isoscope.spec import parse_spec

    return parse_spec(
        {
            "name": "recommend",
            "network": {"width": args.width, "depth": args.depth, "activation": activation},
            "analysis": {"inputs": args.inputs},
        },
        source="<recommend flags>",
    )


def _point_line(finished, done: int, total: int) -> str:
    """One line per stored point (when stderr is not a terminal)."""
    o = finished.outcome
    label = ", ".join(f"{k}={v}" for k, v in finished.point.values.items())
    took = f" in {o['seconds']:.1f} s" if o.get("seconds") is not None else ""
    if o["status"] != "done":
        return f"[{done}/{total}] {label}: failed{took} ({o.get('error', '').splitlines()[0]})"
    sc = o["result"]["score"]
    iso = sc.get("isometry")
    iso_text = "n/a" if iso is None else f"{iso:.3f}"
    return f"[{done}/{total}] {label}: isometry {iso_text} ({sc.get('verdict')}){took}, {finished.worker}"


def _cmd_sweep(args) -> int:
    from isoscope.sweep import load_grid, run_sweep
    from isoscope.sweep.store import check_store

    grid = load_grid(args.grid)
    _positive("--workers", args.workers)
    check_store(args.store)
    bar = _Progress(sys.stderr, "points", min_seconds=0.0)
    quiet = args.json

    def started(description, todo, skipped):
        if not quiet or not bar.on:
            print(
                f"sweep {grid.base.name!r}: {len(grid.points)} points, {skipped} already in "
                f"{args.store}, {todo} to run on {description}",
                file=sys.stderr,
                flush=True,
            )

    def stored(finished, done, total):
        if bar.on:
            bar(done, total)
        else:
            print(_point_line(finished, done, total), file=sys.stderr, flush=True)

    args.interrupt_note = (
        f"every finished point is in {args.store}; run the same command again to resume"
    )
    try:
        summary = run_sweep(
            grid,
            args.store,
            workers=args.workers,
            scheduler=args.scheduler,
            retry_failed=args.retry_failed,
            on_point=stored,
            on_start=started,
        )
    finally:
        bar.close()
    for w in summary.warnings:
        print(f"warning: {w}", file=sys.stderr)
    if args.json:
        from isoscope.report import to_json

        sys.stdout.write(
            to_json(
                {
                    "schema": "isoscope.sweep-summary/1",
                    "store": str(args.store),
                    "grid": str(args.grid),
                    **summary.__dict__,
                    "failures": [{"name": n, "error": e} for n, e in summary.failures],
                }
            )
        )
    else:
        print(
            f"{summary.computed} computed, {summary.skipped} skipped (already stored), "
            f"{summary.failed} failed, in {summary.seconds:.1f} s on {summary.executor}; "
            f"{args.store} holds {summary.stored} points"
        )
        for name, error in summary.failures[:5]:
            print(f"  failed: {name}: {error.splitlines()[0] if error else ''}")
        if summary.failed > 5:
            print(f"  ... and {summary.failed - 5} more (see `isoscope show {args.store}`)")
        print(f"next: isoscope show {args.store}")
    return 0


# ---------------------------------------------------------------------------- show
def _cmd_show(args) -> int:
    """Read a sweep store: a table (or with --x and --y a matrix) on the terminal, ``--json``,
    ``--csv F`` and ``--out DIR`` (figures, points.csv, show.json, report.html)."""
    from isoscope.report import (
        check_new_file,
        show_matrix_text,
        show_table_text,
        to_json,
        write_csv,
        write_show_folder,
    )
    from isoscope.sweep.store import Store
    from isoscope.sweep.view import (
        PHASE_METRICS,
        build_view,
        csv_table,
        default_axes,
        points_table,
        select,
        show_dict,
    )

    csv_path = check_new_file(args.csv, "--csv") if args.csv is not None else None
    with _reserved(args.out) as target:
        with Store.reader(args.store) as store:
            points = store.points()
        x, y = args.x, args.y
        if x is None and y is None and (target is not None or args.json):
            x, y = default_axes(select(points, args.where))
        view = build_view(points, str(args.store), args.where, x, y, args.metric)
        if csv_path is not None:
            write_csv(csv_table(view.points), csv_path)
        if target is not None:
            write_show_folder(view, target)
    if args.json:
        sys.stdout.write(to_json(show_dict(view)))
        return 0
    if args.x is not None and args.y is not None and view.matrices is not None:
        print(show_matrix_text(view.matrices[view.metric]))
    else:
        metrics = list(dict.fromkeys((view.metric, *PHASE_METRICS, "score.verdict")))
        print(show_table_text(points_table(view.points, metrics)))
    for note in view.notes:
        print(f"note: {note}")
    if csv_path is not None:
        print(f"wrote {csv_path} ({len(view.points)} points)")
    if args.out is not None:
        print(f"wrote {args.out}/report.html, show.json, points.csv and figures")
    return 0


# flag -> spec key, for `predict` and `critical`
_DESIGN_FLAGS = (
    ("activation", "network", "activation"),
    ("family", "network", "family"),
    ("depth", "network", "depth"),
    ("alpha", "network", "alpha"),
    ("weights", "init", "weights"),
    ("sigma_w", "init", "sigma_w"),
    ("sigma_b", "init", "sigma_b"),
)


def _design_from_flags(args):
    """A Spec from ``SPEC.toml`` (optional) with the design flags laid over it.

    Flags are validated by the same rules as spec keys (``--sigma-w`` is ``init.sigma_w``).
    Without a spec, ``--activation``, ``--sigma-w`` and ``--depth`` are required.
    """
    from isoscope.spec import load_spec, parse_spec

    given = {
        flag: getattr(args, flag) for flag, _, _ in _DESIGN_FLAGS if getattr(args, flag) is not None
    }
    if args.spec:
        base = load_spec(args.spec).to_dict()
        source = f"{args.spec} with command-line flags"
    else:
        missing = [
            f"--{f.replace('_', '-')}" for f in ("activation", "sigma_w", "depth") if f not in given
        ]
        if missing:
            raise InputError(
                f"no spec file and no {', '.join(missing)}",
                expected="SPEC.toml, or at least --activation, --sigma-w and --depth",
                hint="e.g. isoscope predict --activation tanh --sigma-w 1.01 --depth 100",
            )
        base = {"name": "command-line design", "network": {}, "init": {}}
        source = "<command-line flags>"
    _lay_flags(base, args, _DESIGN_FLAGS)
    if base["network"].get("family", "plain") != "residual":
        base["network"].pop("alpha", None)
    if "activation" in given:  # a spec's leaky_slope does not carry over to another activation
        from isoscope.activations import get_activation

        if get_activation(given["activation"]).name != "leaky-relu":
            base["network"].pop("leaky_slope", None)
    return parse_spec(base, source=source)


def _fmt(v) -> str:
    """A number as the JSON has it: ``null`` where JSON writes null (None, NaN, +-inf)."""
    import math

    if v is None or not math.isfinite(v):
        return "null"
    return f"{v:.6g}"


def _lam(value, log_value) -> str:
    """A lambda-scale number with its natural log: ``0.25 (ln -1.386)``, or ``null (ln -2430)``
    when the value itself is outside float64 (JSON null) but its log is known."""
    import math

    if log_value == -math.inf:
        return "0"
    if log_value is None or not math.isfinite(log_value):
        return _fmt(value)
    return f"{_fmt(value)} (ln {log_value:.6g})"


def _prediction_text(p) -> str:
    """The terminal form of :func:`isoscope.report.prediction_dict`: every number is printed as
    the JSON holds it (``null`` for null, never ``inf``), lambda-scale numbers with their logs."""
    import math

    mf, m, d = p.mean_field, p.moments, p.density
    act = p.activation + (f" (slope {p.slope:g})" if p.slope is not None else "")
    weights = (
        f"{p.weights} weights (predicted as Gaussian: same variance, same infinite-width limit)"
        if p.weights == "uniform"
        else f"{p.weights} weights"
    )
    lines = [
        f"prediction for a {p.family} stack: {act}, {weights}, depth {p.depth}, "
        f"sigma_w = {p.sigma_w:.6g} (sigma_w^2 = {_fmt(p.sigma_w * p.sigma_w)}), "
        f"sigma_b = {p.sigma_b:.6g} (sigma_b^2 = {_fmt(p.sigma_b * p.sigma_b)})"
        + (f", alpha = {p.alpha:g}" if p.family == "residual" else "")
    ]
    lines.append(f"assumes: {p.regime}")
    if mf is not None:
        at = (
            ""
            if p.q_law == mf.q_star or p.q_law != p.q_law
            else f"; the law of phi'(h)^2 is taken at q = {_fmt(p.q_law)}"
        )
        lines.append(
            f"mean field: q* = {_fmt(mf.q_star)}, chi_1 = {mf.chi1:.10g} ({mf.phase}), "
            f"xi_q = {_fmt(mf.xi_q)}, xi_c = {_fmt(mf.xi_c)}, c* = {_fmt(mf.c_star)}{at}"
        )
        if math.isfinite(p.length_factor) and p.length_factor != 1.0:
            lines.append(
                f"length: the pre-activation variance changes by {p.length_factor:.6g} "
                f"per layer, q^1 = {_fmt(p.q_layers[0])}, q^L = {_fmt(p.q_layers[-1])}"
            )
    elif p.family == "residual":
        lines.append(
            f"residual law: tau = {_fmt(p.tau)} (q^1 = {_fmt(p.q_layers[0])}, "
            f"q^L = {_fmt(p.q_layers[-1])})"
        )
    nvar = math.expm1(m.log_m2 - 2.0 * m.log_m1) if m.log_m1 > -math.inf else None
    lines.append(
        "lambda = s^2 moments: "
        + ", ".join(f"m{k} = {_lam(v, lv)}" for k, (v, lv) in enumerate(zip(m[:4], m.logs), 1))
        + f"; m2/m1^2 - 1 = {_fmt(nvar)}"
    )
    lines.append(f"ln s over the non-zero part: mean {_fmt(p.log_s_mean)}, std {_fmt(p.log_s_std)}")
    (lo, hi), (llo, lhi) = d.support, d.log_support
    lines.append(
        f"support of lambda: [{_lam(lo, llo)}, {_lam(hi, lhi)}]; "
        f"atom at zero: {_fmt(d.atom_at_zero)}"
        + "".join(
            f"; atom at {_lam(a, la)} of weight {_fmt(w)}"
            for (a, w), (la, _) in zip(d.atoms, d.log_atoms)
            if la > -math.inf
        )
    )
    lines += [f"! {n}" for n in p.notes]
    return "\n".join(lines)


def _cmd_predict(args) -> int:
    from isoscope.analysis import predict_spec
    from isoscope.report import prediction_dict, to_json

    spec = _design_from_flags(args)
    p = predict_spec(spec, points=args.points)
    if args.json:
        sys.stdout.write(to_json({"schema": "isoscope.prediction/1", **prediction_dict(p)}))
    else:
        print(_prediction_text(p))
    return 0


def _cmd_critical(args) -> int:
    from isoscope.activations import get_activation
    from isoscope.report import to_json
    from isoscope.theory import mean_field as mf

    try:
        act = get_activation(args.activation)
    except (KeyError, ValueError) as e:
        raise InputError(str(e), expected="a registered activation name") from None
    plot_path = _check_figure_path(Path(args.plot)) if args.plot is not None else None
    crit = mf.critical_point(act, args.sigma_b)
    sigma_w = crit.sigma_w if args.sigma_w is None else args.sigma_w
    point = mf.mean_field(act, sigma_w, args.sigma_b)
    line = mf.critical_line(act)
    sb2 = args.sigma_b * args.sigma_b  # not ** 2, which raises OverflowError beyond 1e154
    if plot_path is not None:
        from isoscope import plot

        fig = plot.critical_figure(
            line.sigma_w2,
            line.sigma_b2,
            (sigma_w * sigma_w, sb2),
            f"{act.name}: critical line",
            label=f"sigma_w = {sigma_w:.4g}, sigma_b = {args.sigma_b:.4g}",
        )
        _save_figure(fig, plot_path)
    trainable = None if args.depth is None else bool(args.depth <= 6.0 * point.xi_c)
    if args.json:
        sys.stdout.write(
            to_json(
                {
                    "schema": "isoscope.critical/1",
                    "activation": act.name,
                    "sigma_b": args.sigma_b,
                    "sigma_b2": sb2,
                    "sigma_w": crit.sigma_w,
                    "sigma_w2": crit.sigma_w2,
                    "q_star": crit.q_star,
                    "point": point._asdict(),
                    "depth": args.depth,
                    "depth_within_6_xi_c": trainable,
                    "line": {
                        "sigma_w2": line.sigma_w2,
                        "sigma_b2": line.sigma_b2,
                        "q_star": line.q_star,
                    },
                }
            )
        )
        return 0
    print(
        f"{act.name}, sigma_b = {args.sigma_b:.6g} (sigma_b^2 = {sb2:.6g}): critical "
        f"sigma_w = {crit.sigma_w:.10g} (sigma_w^2 = {crit.sigma_w2:.10g}), q* = {crit.q_star:.6g}"
    )
    print(
        f"at sigma_w = {sigma_w:.6g}: q* = {_fmt(point.q_star)}, chi_1 = {point.chi1:.10g} "
        f"({point.phase}), xi_q = {_fmt(point.xi_q)}, xi_c = {_fmt(point.xi_c)}, c* = {_fmt(point.c_star)}"
    )
    if trainable is not None:
        print(
            f"depth {args.depth} is {'within' if trainable else 'beyond'} 6 xi_c = {_fmt(6 * point.xi_c)} "
            "(common practice: signals propagate through about 6 xi_c layers)"
        )
    print(
        f"critical line: {line.sigma_w2.size} points, sigma_w^2 from {line.sigma_w2.min():.4g} to "
        f"{line.sigma_w2.max():.4g}, sigma_b^2 up to {line.sigma_b2.max():.4g} (--json for the table)"
    )
    return 0


def _check_figure_path(path: Path) -> Path:
    """Refuse, before any work, a figure path isoscope cannot write (suffix, folder, rights)."""
    fmt = path.suffix.lower().lstrip(".")
    if path.is_dir():
        raise InputError(
            f"--plot {str(path)!r} is a folder",
            expected="a file path ending in .png or .svg",
            hint=f"e.g. --plot {str(path / 'critical-line.png')!r}",
        )
    if fmt not in ("png", "svg"):
        raise InputError(
            f"--plot {str(path)!r} has suffix {path.suffix!r}", expected=".png or .svg"
        )
    parent = path.parent
    if not parent.is_dir():
        raise InputError(
            f"--plot {str(path)!r}: folder {str(parent)!r} does not exist",
            expected="a path in an existing folder",
        )
    if not os.access(parent, os.W_OK | os.X_OK):
        raise InputError(
            f"--plot {str(path)!r}: folder {str(parent)!r} is not writable",
            expected="a path in a folder you may write",
        )
    return path


def _save_figure(fig, path: Path) -> None:
    """Save one figure atomically (a temporary file renamed into place); PNG or SVG by suffix."""
    import tempfile

    from isoscope import plot

    _check_figure_path(path)
    fmt = path.suffix.lower().lstrip(".")
    try:
        fd, tmp = tempfile.mkstemp(suffix=path.suffix, prefix=f".{path.name}.", dir=path.parent)
    except OSError as e:
        raise InputError(
            f"--plot {str(path)!r} cannot be written ({e.strerror or e})",
            expected="a path in a folder you may write",
        ) from None
    os.close(fd)
    try:
        fig.savefig(tmp, dpi=130, format=fmt)
        from isoscope.folders import interrupted

        if interrupted():
            raise KeyboardInterrupt
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.remove(tmp)
        plot._pyplot().close(fig)


def _add_design_flags(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "spec", metavar="SPEC.toml", nargs="?", help="a design (flags override its keys)"
    )
    p.add_argument("--activation", help="activation name (network.activation)")
    p.add_argument(
        "--weights", help="gaussian | orthogonal | uniform (init.weights; default orthogonal)"
    )
    p.add_argument(
        "--sigma-w",
        dest="sigma_w",
        type=float,
        help="weight scale, std x sqrt(fan_in) (init.sigma_w)",
    )
    p.add_argument(
        "--sigma-b", dest="sigma_b", type=float, help="bias scale, a std (init.sigma_b; default 0)"
    )
    p.add_argument("--depth", type=int, help="number of weight layers (network.depth)")
    p.add_argument("--family", help="plain | residual (network.family; default plain)")
    p.add_argument("--alpha", type=float, help="residual branch scale (network.alpha; default 1)")


# argparse's wording; the choices are quoted up to Python 3.11 and bare from 3.12 on
_INVALID_CHOICE = re.compile(r"invalid choice: '?(?P<got>[^' ]*)'? \(choose from (?P<allowed>.*)\)")


class _Parser(argparse.ArgumentParser):
    """argparse with the nearest valid name suggested for a misspelled command or choice."""

    def error(self, message: str) -> NoReturn:
        m = _INVALID_CHOICE.search(message)
        if m:
            allowed = [c.strip().strip("'") for c in m["allowed"].split(",")]
            near = did_you_mean(m["got"], allowed)
            if near:
                message = f"{message}; {near}"
        super().error(message)


# Two or three runnable examples per command, printed at the end of its --help (the files named
# are in the repository's examples/ folder; tests/test_suggest.py parses every line).
EXAMPLES = {
    "analyze": [
        "isoscope analyze examples/kiln-monitor-tanh-chaotic.toml",
        "isoscope analyze examples/soil-moisture-erf-orthogonal.toml --out results/soil",
        "isoscope analyze examples/sonar-denoiser-relu-gaussian.toml --json --inputs 4",
    ],
    "isoscope": [
        "isoscope demo",
        "isoscope analyze examples/kiln-monitor-tanh-chaotic.toml",
        "isoscope analyze --help",
    ],
    "demo": ["isoscope demo", "isoscope demo --out results/demo --json"],
    "compare": [
        "isoscope compare examples/kiln-monitor-tanh-chaotic.toml "
        "examples/soil-moisture-erf-orthogonal.toml",
        "isoscope compare examples/tide-gauge-residual-tanh.toml "
        "examples/kiln-monitor-tanh-chaotic.toml --seed 3 --out results/pair",
    ],
    "recommend": [
        "isoscope recommend --activation tanh --depth 64 --width 256",
        "isoscope recommend --activation relu --depth 32 --width 128 --family residual",
        "isoscope recommend --activation erf --depth 100 --width 200 --sigma-b 0.05 "
        "--out results/erf",
    ],
    "sweep": [
        "isoscope sweep examples/grids/avalanche-phase.toml --store avalanche.sqlite",
        "isoscope sweep grid.toml --store s.sqlite --workers 1",
        "isoscope sweep grid.toml --store s.sqlite --scheduler local",
    ],
    "show": [
        "isoscope show phase.sqlite",
        "isoscope show phase.sqlite --x init.sigma_w --y init.sigma_b --where network.depth=16",
        "isoscope show phase.sqlite --out results/phase --csv phase.csv",
    ],
    "predict": [
        "isoscope predict --activation tanh --sigma-w 1.1225 --sigma-b 0.05 --depth 200",
        "isoscope predict examples/tide-gauge-residual-tanh.toml --json",
        "isoscope predict --activation relu --weights gaussian --sigma-w 1.4142 --depth 16",
    ],
    "critical": [
        "isoscope critical --activation tanh --sigma-b 0.1",
        "isoscope critical --activation erf --sigma-w 1.5 --depth 300",
        "isoscope critical --activation tanh --plot critical-line.png",
    ],
}


def _epilog(command: str) -> dict:
    """``add_parser`` keywords that end a command's --help with its examples."""
    lines = "\n".join(f"  {e}" for e in EXAMPLES[command])
    return {
        "epilog": f"examples:\n{lines}",
        "formatter_class": argparse.RawDescriptionHelpFormatter,
    }


def build_parser() -> argparse.ArgumentParser:
    """The argument parser (exposed for documentation and tests)."""
    p = _Parser(
        prog="isoscope",
        description="Jacobian spectra of deep networks at initialization: measure, score, report.",
        **_epilog("isoscope"),
    )
    from isoscope import __version__

    p.add_argument("--version", action="version", version=f"isoscope {__version__}")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    a = sub.add_parser(
        "analyze",
        help="measure and score one design from a TOML spec",
        description="Measure the input-output Jacobian spectrum of one design.",
        **_epilog("analyze"),
    )
    a.add_argument("spec", metavar="SPEC.toml", help="the design (see docs/spec.md)")
    a.add_argument(
        "--out",
        metavar="DIR",
        help="output folder (default isoscope-out/ and a folder name made from the spec's name; "
        "with --json and no --out nothing is written to disk)",
    )
    a.add_argument("--json", action="store_true", help="print the result JSON to stdout")
    a.add_argument("--seed", type=int, help="PRNG seed, 0 .. 2^64 - 1 (analysis.seed)")
    a.add_argument("--inputs", type=int, help="number of draws (analysis.inputs)")
    a.add_argument("--dtype", help="float64 | float32 (analysis.dtype)")
    a.add_argument("--width", type=int, help="width N (network.width)")
    a.add_argument("--depth", type=int, help="number of weight layers (network.depth)")
    a.add_argument("--sigma-w", dest="sigma_w", type=float, help="weight scale (init.sigma_w)")
    a.add_argument("--sigma-b", dest="sigma_b", type=float, help="bias scale (init.sigma_b)")
    a.set_defaults(run=_cmd_analyze)

    d = sub.add_parser(
        "demo",
        help="run the built-in scenario end to end",
        description="Analyse the four built-in designs and write one report folder.",
        **_epilog("demo"),
    )
    d.add_argument(
        "--out",
        metavar="DIR",
        default="isoscope-demo",
        help="output folder (default isoscope-demo)",
    )
    d.add_argument("--json", action="store_true", help="print the results JSON to stdout")
    d.set_defaults(run=_cmd_demo)

    cm = sub.add_parser(
        "compare",
        help="rank several designs side by side",
        description="Analyse several designs (each exactly as `analyze` would) and "
        "rank them by isometry score, with gain, spread, outliers, "
        "agreement with theory and a trainable-depth estimate.",
        **_epilog("compare"),
    )
    cm.add_argument("specs", metavar="SPEC.toml", nargs="+", help="two or more designs")
    cm.add_argument(
        "--out",
        metavar="DIR",
        help="output folder (default isoscope-out/comparison; "
        "with --json and no --out nothing is written to disk)",
    )
    cm.add_argument("--json", action="store_true", help="print comparison.json to stdout")
    cm.add_argument("--seed", type=int, help="one seed for every design (default: each spec's own)")
    cm.add_argument("--inputs", type=int, help="draws per design (default: each spec's own)")
    cm.set_defaults(run=_cmd_compare)

    rc = sub.add_parser(
        "recommend",
        help="propose an initialization and check it by measurement",
        description="Propose weights, sigma_w and sigma_b (alpha for residual "
        "stacks) for an activation, depth and width from theory, then "
        "measure every candidate at that width. Advice judged at "
        "initialization only.",
        **_epilog("recommend"),
    )
    rc.add_argument("--activation", required=True, help="activation name")
    rc.add_argument("--depth", type=int, required=True, help="number of weight layers L")
    rc.add_argument("--width", type=int, required=True, help="width N")
    rc.add_argument("--family", default="plain", help="plain | residual (default plain)")
    rc.add_argument(
        "--sigma-b",
        dest="sigma_b",
        type=float,
        help="bias scale to keep (default: chosen for the target spread)",
    )
    rc.add_argument(
        "--target-spread",
        dest="target_spread",
        type=float,
        help="target std of ln s (default 0.1: a gain-1 log-normal spectrum of that "
        "spread scores 0.86, inside the isometric verdict)",
    )
    rc.add_argument("--inputs", type=int, default=2, help="draws per candidate (default 2)")
    rc.add_argument("--seed", type=int, default=0, help="seed of every candidate (default 0)")
    rc.add_argument("--out", metavar="DIR", help="also write a folder with the report")
    rc.add_argument("--json", action="store_true", help="print recommendation.json to stdout")
    rc.set_defaults(run=_cmd_recommend)

    sw = sub.add_parser(
        "sweep",
        help="a grid of designs into a resumable SQLite store",
        description="Measure and predict every point of a grid (a spec plus a "
        "[grid] table of dotted spec keys and lists) exactly as "
        "`analyze` would, in parallel, committing each point to the "
        "store as it finishes. Run the same command again to resume.",
        **_epilog("sweep"),
    )
    sw.add_argument("grid", metavar="GRID.toml", help="a spec with a [grid] table (docs/sweep.md)")
    sw.add_argument(
        "--store",
        required=True,
        metavar="FILE.sqlite",
        help="the SQLite store (created if absent; finished points are skipped)",
    )
    sw.add_argument(
        "--workers",
        type=int,
        help="worker processes (default: the cores); with --scheduler local, the "
        "LocalCluster's workers",
    )
    sw.add_argument(
        "--scheduler",
        metavar="ADDRESS",
        help="run on a Dask distributed cluster: a scheduler address "
        "(tcp://host:8786) or 'local' for a LocalCluster on 127.0.0.1 "
        "(needs pip install 'isoscope[cluster]')",
    )
    sw.add_argument(
        "--retry-failed",
        dest="retry_failed",
        action="store_true",
        help="measure again the points stored as failed",
    )
    sw.add_argument("--json", action="store_true", help="print the summary JSON to stdout")
    sw.set_defaults(run=_cmd_sweep)

    sh = sub.add_parser(
        "show",
        help="tables, phase diagrams and exports from a sweep store",
        description="Read a sweep store (read-only, also while a sweep writes "
        "it): one row per point, or with --x and --y a metric as a "
        "matrix; --json, --csv and a report folder with phase "
        "diagrams, depth curves and the mean-field critical line.",
        **_epilog("show"),
    )
    sh.add_argument("store", metavar="FILE.sqlite", help="a store written by `isoscope sweep`")
    sh.add_argument("--x", metavar="KEY", help="setting along the columns (a dotted spec key)")
    sh.add_argument("--y", metavar="KEY", help="setting along the rows (with --x)")
    sh.add_argument(
        "--metric",
        default="score.isometry",
        metavar="NAME",
        help="stored number to show (a dotted result.json name; default score.isometry)",
    )
    sh.add_argument(
        "--where",
        action="append",
        default=[],
        metavar="KEY=VALUE",
        help="keep only points with this setting (repeatable; all must hold)",
    )
    sh.add_argument(
        "--out",
        metavar="DIR",
        help="write a report folder (figures, points.csv, show.json, report.html)",
    )
    sh.add_argument("--csv", metavar="FILE", help="write every point with every number as CSV")
    sh.add_argument("--json", action="store_true", help="print show JSON to stdout")
    sh.set_defaults(run=_cmd_show)

    pr = sub.add_parser(
        "predict",
        help="theory only: mean field and the predicted spectrum",
        description="Predict the Jacobian spectrum of a design at infinite width "
        "(no network is built). Give a spec, flags, or both.",
        **_epilog("predict"),
    )
    _add_design_flags(pr)
    pr.add_argument(
        "--points", type=int, default=400, help="grid size of the density (default 400)"
    )
    pr.add_argument("--json", action="store_true", help="print the prediction JSON to stdout")
    pr.set_defaults(run=_cmd_predict)

    c = sub.add_parser(
        "critical",
        help="critical sigma_w for a sigma_b, the critical line, depth scales",
        description="Where chi_1 = 1 for an activation: the critical weight scale at "
        "the given bias scale, the whole critical line, and the depth "
        "scales at your point.",
        **_epilog("critical"),
    )
    c.add_argument("--activation", required=True, help="activation name")
    c.add_argument(
        "--sigma-b", dest="sigma_b", type=float, default=0.0, help="bias scale (default 0)"
    )
    c.add_argument(
        "--sigma-w",
        dest="sigma_w",
        type=float,
        help="your weight scale, for the depth scales (default: the critical one)",
    )
    c.add_argument("--depth", type=int, help="your depth, compared with 6 xi_c")
    c.add_argument("--plot", metavar="FILE.png", help="write the critical-line figure (PNG or SVG)")
    c.add_argument("--json", action="store_true", help="print the result JSON to stdout")
    c.set_defaults(run=_cmd_critical)
    return p


def main(argv: list[str] | None = None) -> int:
    """Entry point: parse ``argv``, run the command, map errors to exit codes.

    SIGINT is routed through :func:`isoscope.folders.install_interrupt_flag` for the run (and
    the previous handler restored afterwards), so an interrupt that some library swallowed still
    stops the run before any folder is switched, and the exit code is 130.
    """
    from isoscope import folders

    parser = build_parser()
    args = parser.parse_args(argv)
    main_thread = __import__("threading").current_thread() is __import__("threading").main_thread()
    previous = signal.getsignal(signal.SIGINT) if main_thread else None
    if main_thread:
        folders.install_interrupt_flag()
    try:
        code = args.run(args)
        sys.stdout.flush()
        if folders.interrupted():
            raise KeyboardInterrupt
        return code
    except SolverError as e:  # a solver limit, not bad input
        print(f"isoscope {args.command}: error: {e}", file=sys.stderr)
        return 1
    except (InputError, TheoryError) as e:
        print(f"isoscope {args.command}: error: {e}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        done = folders.committed()
        note = getattr(args, "interrupt_note", None) or (
            f"{done[-1]} had already been written completely"
            if done
            else "no output folder was changed"
        )
        print(f"isoscope: interrupted; {note}", file=sys.stderr)
        if argv is None:
            # the process entry point: leave at once.  An interrupt that landed inside JAX's native
            # code can leave it in a state that crashes the interpreter's shutdown (seen as SIGSEGV
            # or SIGABRT); every folder is already settled, so skip the shutdown.
            sys.stdout.flush()
            sys.stderr.flush()
            os._exit(130)
        return 130
    except BrokenPipeError:
        # the reader of stdout left (`| head`): nothing more to say, and nothing at exit either
        try:
            os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        except (OSError, ValueError):
            pass
        return 141
    except Exception:  # an internal error: show it, exit 1
        traceback.print_exc()
        print(
            "isoscope: internal error (a bug: please report it with the spec that caused it)",
            file=sys.stderr,
        )
        return 1
    finally:
        if main_thread:
            signal.signal(signal.SIGINT, previous)
            folders._INTERRUPTED = False


if __name__ == "__main__":
    sys.exit(main())
