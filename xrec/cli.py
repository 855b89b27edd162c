"""The ``xrec`` command line: run specs, compare them, export and serve blend files, run the demo."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

from xrec._jsonable import json_default
from xrec.errors import XrecError


def _print_json(payload: Any) -> None:
    json.dump(payload, sys.stdout, indent=2, sort_keys=False, default=json_default)
    sys.stdout.write("\n")


def _cmd_run(args: argparse.Namespace) -> int:
    from xrec.experiment import run_experiment
    from xrec.report import experiment_payload, format_experiment
    from xrec.spec import load_spec

    spec = _with_cluster_flags(load_spec(args.spec), args)
    result = run_experiment(spec, progress=not args.quiet and not args.json, by=args.by)
    if args.json:
        _print_json(experiment_payload(result))
    else:
        print(format_experiment(result))
    return 0


def _with_cluster_flags(spec, args: argparse.Namespace):
    """``spec`` with ``--scheduler`` / ``--workers`` put in its ``[evaluate]`` table (they replace the spec's own)."""
    from xrec.cluster import check_cluster_options

    if args.scheduler is None and args.workers is None:
        return spec
    check_cluster_options(args.scheduler, args.workers, where="--")
    evaluate = {k: v for k, v in spec.evaluate.items() if k not in ("scheduler", "workers")}
    evaluate.update({k: v for k, v in (("scheduler", args.scheduler), ("workers", args.workers)) if v is not None})
    spec.evaluate = evaluate
    return spec


def _cmd_compare(args: argparse.Namespace) -> int:
    from xrec.experiment import compare_specs
    from xrec.report import format_comparison
    from xrec.spec import load_spec

    baseline, candidate = (_with_cluster_flags(load_spec(path), args) for path in (args.baseline, args.candidate))
    if args.overlap is not None and args.overlap < 1:
        from xrec.errors import ConfigError

        raise ConfigError(f"--overlap: must be at least 1, got {args.overlap}")
    comparison = compare_specs(baseline, candidate, progress=not args.quiet and not args.json, by=args.by,
                               overlap=args.overlap)
    if args.json:
        _print_json(comparison.to_dict())
    else:
        print(format_comparison(comparison))
        if len(comparison.segments):
            from xrec._validation import parse_metric_column
            from xrec.report import HEADLINE_METRICS, format_segment_comparison

            for metric in comparison.segments["metric"].unique():
                if parse_metric_column(metric)[0] in HEADLINE_METRICS:  # every metric: --json
                    print("\n" + format_segment_comparison(comparison, metric))
    return 0


def _cmd_export(args: argparse.Namespace) -> int:
    from xrec.experiment import export_spec
    from xrec.spec import load_spec

    export_spec(_with_cluster_flags(load_spec(args.spec), args), args.output, scorer=args.scorer, progress=not args.quiet,
                bundle=args.bundle)
    if args.output:
        print(f"blend file written: {args.output}")
    if args.bundle:
        print(f"bundle written: {args.bundle}")
    return 0


def _cmd_serve(args: argparse.Namespace) -> int:
    import os

    from xrec.serve import serve

    if not 0 < args.port < 65536:
        from xrec.errors import ConfigError

        raise ConfigError(f"--port: must be between 1 and 65535, got {args.port}")
    print(f"serving {args.bundle} on http://{args.host}:{args.port} (Ctrl+C stops, kill -HUP {os.getpid()} reloads)", flush=True)
    serve(args.bundle, host=args.host, port=args.port, log_level=args.log_level)
    return 0


def _cmd_recommend(args: argparse.Namespace) -> int:
    from xrec.blendfile import read_blend
    from xrec.errors import ConfigError
    from xrec.runtime import runtime_for_blend_file

    if args.k < 1:  # checked before the refit, which can take a while
        raise ConfigError(f"-k: must be at least 1, got {args.k}")
    if Path(args.blend_file).is_dir():  # a bundle: nothing to refit, filters allowed
        from xrec.bundle import load_bundle

        filters = _json_option(args.filters, "--filters")
        runtime = load_bundle(args.blend_file)
        frames = {user: runtime.recommend(user, k=args.k, unknown=args.unknown, filters=filters) for user in args.user}
    else:
        if args.filters is not None:
            raise ConfigError("--filters: needs a bundle folder (xrec export --bundle); a blend file alone holds no catalog table")
        n_items = read_blend(args.blend_file).split_record.get("n_items")
        if isinstance(n_items, int) and args.k > n_items:  # the catalog size the file records, before the refit
            raise ConfigError(f"-k: {args.k} exceeds the catalog's {n_items} items (split.record.n_items of the blend file)")
        runtime = runtime_for_blend_file(args.blend_file, data_folder=args.data, progress=not args.quiet and not args.json)
        frames = {user: runtime.recommend(user, k=args.k, unknown=args.unknown) for user in args.user}
    if args.json:
        _print_json({user: frame.to_dict(orient="records") for user, frame in frames.items()})
    else:
        for user, frame in frames.items():
            print(f"user {user}")
            print(frame.to_string(index=False))
    return 0


def _json_option(text: str | None, option: str) -> Any:
    from xrec.errors import ConfigError

    if text is None:
        return None
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise ConfigError(f"{option}: not valid JSON ({exc})") from None


def _cmd_demo(args: argparse.Namespace) -> int:
    from xrec.demo import run_demo

    summary = run_demo(output=Path(args.output), shop=args.shop, progress=not args.quiet and not args.json, quick=args.quick)
    if args.json:
        _print_json(summary)
    elif args.quiet:  # the steps were silent; the summary with the paths still matters
        from xrec.demo import summary_text

        print(summary_text(summary))
    return 0


def build_parser() -> argparse.ArgumentParser:
    """The ``xrec`` argument parser with its subcommands (demo, run, compare, export, recommend, serve)."""
    parser = argparse.ArgumentParser(
        prog="xrec",
        description="Prototype cross-modal recommenders: evaluate sources and blends offline, compare them, export the winner.",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def cluster(p: argparse.ArgumentParser) -> None:
        p.add_argument("--scheduler", default=None, metavar="ADDRESS",
                       help="evaluate on the Dask cluster of this scheduler (e.g. tcp://host:8786), users sharded over its workers")
        p.add_argument("--workers", type=int, default=None, metavar="N",
                       help="evaluate on a local Dask cluster of N worker processes, users sharded over them")

    def segments(p: argparse.ArgumentParser) -> None:
        p.add_argument("--by", action="append", default=None, metavar="SEGMENTS",
                       help="also break results down by segment: item_segment (held-out item new / tail / head), "
                            "user_segment (training-history length) or a catalog column; repeatable")

    def common(p: argparse.ArgumentParser, json_flag: bool = True) -> None:
        p.add_argument("-q", "--quiet", action="store_true", help="no progress bars")
        if json_flag:
            p.add_argument("--json", action="store_true", help="machine-readable JSON on stdout")

    p = sub.add_parser("demo", help="run the whole product on the demo shop and write a report", description=(
        "Encode the demo shop, split it by the mixed protocol (known and new items held out together), "
        "fit every source, search blend weights on the validation split, evaluate on the test split, "
        "compare known-item and new-item results side by side, and write scorecard JSON, blend file and HTML report."))
    p.add_argument("-o", "--output", default="xrec-out", help="output folder (default: %(default)s)")
    p.add_argument("--shop", default=None, help="demo shop folder (default: the one shipped in the repository)")
    p.add_argument("--quick", action="store_true", help="smaller search, for smoke tests")
    common(p)
    p.set_defaults(func=_cmd_demo)

    p = sub.add_parser("run", help="evaluate the sources and blends of a spec", description=(
        "Evaluate every source and blend of an experiment spec (a TOML file or a built-in name such as "
        "'movielens') and print a scorecard table with paired comparisons against the baseline."))
    p.add_argument("spec", help="spec file, or a built-in spec name")
    cluster(p)
    segments(p)
    common(p)
    p.set_defaults(func=_cmd_run)

    p = sub.add_parser("compare", help="compare the primary scorers of two specs on the same split", description=(
        "Evaluate the primary scorer of each spec on the same data and split, and report paired "
        "differences with bootstrap confidence intervals and randomization p-values."))
    p.add_argument("baseline", help="baseline spec file or built-in name")
    p.add_argument("candidate", help="candidate spec file or built-in name")
    p.add_argument("--overlap", type=int, default=None, metavar="K",
                   help="also report the mean top-K overlap per user and the items that moved most "
                        "(default: the baseline spec's evaluate.overlap, else off)")
    cluster(p)
    segments(p)
    common(p)
    p.set_defaults(func=_cmd_compare)

    p = sub.add_parser("export", help="write a blend file for a spec's scorer", description=(
        "Fit, evaluate on the test split and write the blend file (TOML) that a service loads."))
    p.add_argument("spec", help="spec file or built-in name")
    p.add_argument("-o", "--output", default=None, help="blend file to write (.toml)")
    p.add_argument("--bundle", default=None, metavar="DIR",
                   help="also (or instead) write a bundle folder: the blend file plus every learned artifact, servable with 'xrec serve'")
    p.add_argument("--scorer", default=None, help="which source or blend to export (default: the spec's primary)")
    cluster(p)
    common(p, json_flag=False)
    p.set_defaults(func=_cmd_export)

    p = sub.add_parser("recommend", help="top-K items for users from a blend file", description=(
        "Load a blend file, refit its sources on the recorded data and split, and list the top-K items."))
    p.add_argument("blend_file", help="blend file written by 'xrec export' or 'xrec demo', or a bundle folder (no refit)")
    p.add_argument("--user", action="append", required=True, help="user id (repeat for several)")
    p.add_argument("-k", type=int, default=10, help="list length (default: %(default)s)")
    p.add_argument("--unknown", choices=("error", "popular"), default="error",
                   help="a user the blend file does not know: an error, or the most popular items (default: %(default)s)")
    p.add_argument("--filters", default=None, metavar="JSON",
                   help='item conditions, bundles only, e.g. \'{"attributes": {"price": {"max": 20}}}\' (see the README)')
    p.add_argument("--data", default=None, help="folder the data moved to (a MovieLens or demo-shop folder, or the one holding the data files), when it is not where the blend file records")
    common(p)
    p.set_defaults(func=_cmd_recommend)

    p = sub.add_parser("serve", help="serve a bundle over HTTP (JSON)", description=(
        "Verify a bundle folder and answer recommendation, similar-item and text-search requests over HTTP. "
        "POST /reload or SIGHUP swaps in the folder's current bundle."))
    p.add_argument("bundle", help="bundle folder written by 'xrec export --bundle' or 'xrec demo'")
    p.add_argument("--port", type=int, default=8000, help="TCP port (default: %(default)s)")
    p.add_argument("--host", default="127.0.0.1", help="address to bind (default: %(default)s, this machine only)")
    p.add_argument("--log-level", default="warning", choices=("critical", "error", "warning", "info", "debug"),
                   help="server log level; 'info' logs every request (default: %(default)s)")
    p.set_defaults(func=_cmd_serve)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``xrec`` console script."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except XrecError as exc:
        print(f"xrec: error: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:  # unreadable or unwritable files: say which, without a traceback
        print(f"xrec: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("xrec: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
