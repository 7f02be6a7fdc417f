"""The ``isoscope`` command.

Exit codes: 0 success, 2 bad input (the message names the file, key, value and what is
allowed), 1 internal error.  ``--json`` sends the machine-readable result to stdout and
keeps everything else on stderr.
"""

from __future__ import annotations

import argparse
import sys
import traceback
from importlib import resources
from pathlib import Path

from isoscope.errors import InputError, TheoryError

__all__ = ["main", "build_parser"]

DEMO_TITLE = "isoscope demo: initializing the Heron-7 greenhouse controller"
DEMO_INTRO = (
    "<p>A team building the climate controller of a fleet of research greenhouses trains a "
    "64-layer, 256-wide fully connected policy (sensor readings in, vent, heater and misting "
    "commands out). Before paying for training runs they compare four initializations by the "
    "singular values of the input-output Jacobian at initialization: a design whose singular "
    "values all sit near 1 passes gradients through every layer undistorted.</p>")


def _demo_specs() -> dict[str, str]:
    folder = resources.files("isoscope") / "scenarios"
    return {p.name[:-5]: p.read_text(encoding="utf-8")
            for p in sorted(folder.iterdir(), key=lambda p: p.name) if p.name.endswith(".toml")}


def _cmd_analyze(args) -> int:
    from isoscope.analysis import analyze
    from isoscope.report import result_dict, summary_table, to_json, write_analysis_folder
    from isoscope.spec import load_spec

    spec = load_spec(args.spec)
    out = Path(args.out) if args.out else Path("isoscope-out") / spec.name
    result = analyze(spec)
    write_analysis_folder(result, out)
    if args.json:
        sys.stdout.write(to_json(result_dict(result)))
    else:
        print(summary_table([result]))
        print(f"\nwrote {out}/report.html, result.json and figures")
    return 0


def _cmd_demo(args) -> int:
    import tomllib

    from isoscope.analysis import analyze
    from isoscope.report import result_dict, summary_table, to_json, write_comparison_folder
    from isoscope.spec import parse_spec

    texts = _demo_specs()
    analyses = []
    for i, (name, text) in enumerate(texts.items(), 1):
        if sys.stderr.isatty() and not args.json:
            print(f"[{i}/{len(texts)}] {name}", file=sys.stderr, flush=True)
        analyses.append(analyze(parse_spec(tomllib.loads(text), source=f"<built-in {name}.toml>")))
    out = Path(args.out)
    write_comparison_folder(analyses, out, DEMO_TITLE, DEMO_INTRO, spec_texts=texts)
    if args.json:
        sys.stdout.write(to_json({"results": [result_dict(a) for a in analyses]}))
    else:
        print(summary_table(analyses))
        print(f"\nwrote {out}/report.html (open it in a browser); the four specs are in {out}/specs/")
    return 0


def build_parser() -> argparse.ArgumentParser:
    """The argument parser (exposed for documentation and tests)."""
    p = argparse.ArgumentParser(
        prog="isoscope",
        description="Jacobian spectra of deep networks at initialization: measure, score, report.")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    a = sub.add_parser("analyze", help="measure and score one design from a TOML spec",
                       description="Measure the input-output Jacobian spectrum of one design.")
    a.add_argument("spec", metavar="SPEC.toml", help="the design (see docs/spec.md)")
    a.add_argument("--out", metavar="DIR", help="output folder (default isoscope-out/NAME)")
    a.add_argument("--json", action="store_true", help="print the result JSON to stdout")
    a.set_defaults(run=_cmd_analyze)

    d = sub.add_parser("demo", help="run the built-in scenario end to end",
                       description="Analyse the four built-in designs and write one report folder.")
    d.add_argument("--out", metavar="DIR", default="isoscope-demo", help="output folder (default isoscope-demo)")
    d.add_argument("--json", action="store_true", help="print the results JSON to stdout")
    d.set_defaults(run=_cmd_demo)
    return p


def main(argv: list[str] | None = None) -> int:
    """Entry point: parse ``argv``, run the command, map errors to exit codes."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.run(args)
    except (InputError, TheoryError) as e:
        print(f"isoscope {args.command}: error: {e}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("isoscope: interrupted; no output folder was changed", file=sys.stderr)
        return 130
    except Exception:  # an internal error: show it, exit 1
        traceback.print_exc()
        print("isoscope: internal error (a bug: please report it with the spec that caused it)",
              file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
