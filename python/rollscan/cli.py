"""The ``rollscan`` command: ``process``, ``summary``, ``demo`` and ``bench``.

Exit status: 0 on success, 2 on bad input or usage (one line on stderr, nothing
written), 130 when interrupted (temporary files removed, no half-written output).
"""

from __future__ import annotations

import argparse
import json
import sys

COLUMN_OPTIONS = {
    "reward": "per-step reward",
    "value": "per-step value estimate V(s_t); when absent, discounted returns are computed instead of GAE",
    "next_value": "V(s_{t+1}) as seen at step t; read at truncated steps and at a stream's last step",
    "terminated": "per-step flag: the state after the step is terminal",
    "truncated": "per-step flag: the episode was cut after the step (time limit)",
    "stream": "integer stream id of each row (1-D shards holding several interleaved streams)",
}
OUTPUT_OPTIONS = {"advantage": "advantages", "return": "returns"}


def _add_columns(p, outputs=False):
    from rollscan.stored.schema import DEFAULT_NAMES

    g = p.add_argument_group("column names")
    for key, help_ in COLUMN_OPTIONS.items():
        g.add_argument(
            f"--{key.replace('_', '-')}-column",
            dest=f"col_{key}",
            metavar="NAME",
            help=f"{help_} (default {DEFAULT_NAMES[key]!r})",
        )
    if outputs:
        for key, what in OUTPUT_OPTIONS.items():
            g.add_argument(
                f"--{key}-column",
                dest=f"col_{key}",
                metavar="NAME",
                help=f"output column for the {what} (default {DEFAULT_NAMES[key]!r})",
            )


def _names(args):
    from rollscan.stored.schema import Names

    keys = [*COLUMN_OPTIONS, *OUTPUT_OPTIONS]
    return Names.from_options({k: getattr(args, f"col_{k}", None) for k in keys})


def _positive_int(text):
    try:
        value = int(text.replace("_", ""))
    except ValueError:
        raise argparse.ArgumentTypeError(f"not an integer: {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be >= 1, got {value}")
    return value


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="rollscan",
        description="Post-process stored reinforcement-learning rollouts (docs/stored-format.md).",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    p = sub.add_parser(
        "process",
        help="add advantages and returns to every shard; write a per-episode table",
        description="Read the shards in the order given (one data set), add per-step "
        "advantages and returns (GAE with a value column, else discounted returns), write "
        "one output shard per input plus episodes.npz/.parquet into --out.",
    )
    p.add_argument(
        "inputs", nargs="+", metavar="SHARD", help=".npz or .parquet shard files, in data order"
    )
    p.add_argument("--out", required=True, metavar="DIR", help="output directory")
    p.add_argument("--gamma", required=True, type=float, help="discount factor in [0, 1]")
    p.add_argument("--lam", type=float, help="GAE lambda in [0, 1] (required with a value column)")
    p.add_argument(
        "--normalize", action="store_true", help="normalise advantages over the whole data set"
    )
    p.add_argument(
        "--eps", type=float, default=1e-8, help="added to the std by --normalize (default 1e-8)"
    )
    p.add_argument(
        "--chunk-steps",
        type=_positive_int,
        default=1 << 20,
        metavar="N",
        help="steps held in memory at once (default 1048576)",
    )
    p.add_argument(
        "--engine",
        choices=["local", "dask"],
        default="local",
        help="execution engine: this process, or one task per shard on a Dask cluster "
        "(needs the dask extra; default local)",
    )
    p.add_argument(
        "--scheduler",
        metavar="ADDRESS",
        help="with --engine dask: address of a running Dask scheduler (default: start a "
        "local cluster of --workers processes)",
    )
    p.add_argument(
        "--workers",
        type=_positive_int,
        metavar="N",
        help="with --engine dask and no --scheduler: worker processes of the local cluster "
        "(default 1)",
    )
    p.add_argument(
        "--connect-timeout",
        type=float,
        default=5.0,
        metavar="SECONDS",
        help="with --scheduler: give up connecting after this long (default 5)",
    )
    p.add_argument(
        "--kernels",
        choices=["rollscan", "numpy"],
        default="rollscan",
        help="compiled kernels, or the NumPy reference path (default rollscan)",
    )
    keep = p.add_mutually_exclusive_group()
    keep.add_argument("--force", action="store_true", help="replace existing outputs")
    keep.add_argument(
        "--resume",
        action="store_true",
        help="with --engine dask: keep the complete outputs of an earlier run with the same "
        "inputs and options (verified by their receipts), redo and replace the rest",
    )
    p.add_argument("--quiet", action="store_true", help="no progress bar, no closing line")
    _add_columns(p, outputs=True)

    s = sub.add_parser(
        "summary",
        help="episode statistics of shards or per-episode tables",
        description="Print episodes, steps, return and length statistics and the share of "
        "terminated vs truncated endings. Accepts step shards or episodes.* tables.",
    )
    s.add_argument("inputs", nargs="+", metavar="SHARD")
    s.add_argument("--json", action="store_true", help="print the figures as JSON")
    s.add_argument(
        "--plot", metavar="FILE.png", help="write a PNG of the returns (needs matplotlib)"
    )
    s.add_argument("--chunk-steps", type=_positive_int, default=1 << 20, metavar="N")
    s.add_argument("--quiet", action="store_true", help="no progress bar")
    _add_columns(s)

    d = sub.add_parser("demo", help="generate a data set, process and summarise it, with timings")
    d.add_argument(
        "--out", default="rollscan-demo", metavar="DIR", help="(default ./rollscan-demo)"
    )
    d.add_argument("--steps", type=_positive_int, default=1_000_000, help="(default 1000000)")
    d.add_argument(
        "--kernels", choices=["rollscan", "numpy"], default="rollscan", help=argparse.SUPPRESS
    )

    b = sub.add_parser("bench", help="rollscan against NumPy/SciPy references", add_help=False)
    b.add_argument("rest", nargs=argparse.REMAINDER)
    return parser


def _progress(args) -> bool:
    return not args.quiet and sys.stderr.isatty()


def _cmd_process(args) -> int:
    from rollscan.stored.errors import StoredError

    common = dict(
        gamma=args.gamma,
        lam=args.lam,
        normalize=args.normalize,
        eps=args.eps,
        chunk_steps=args.chunk_steps,
        names=_names(args),
        force=args.force,
        kernels=args.kernels,
        progress=_progress(args),
    )
    if args.engine == "dask":
        from rollscan.stored.dask_engine import process_dask

        if args.scheduler and args.workers:
            raise StoredError(
                "--workers starts a local cluster; it cannot be used with --scheduler"
            )
        rep = process_dask(
            args.inputs,
            args.out,
            resume=args.resume,
            scheduler=args.scheduler,
            workers=args.workers,
            connect_timeout=args.connect_timeout,
            **common,
        )
    else:
        for option in ("scheduler", "workers", "resume"):
            if getattr(args, option):
                raise StoredError(f"--{option} needs --engine dask")
        from rollscan.stored.process import process

        rep = process(args.inputs, args.out, **common)
    if not args.quiet:
        kept = rep.timings.get("kept")
        note = f" ({kept} complete outputs kept)" if kept else ""
        print(
            f"{rep.n_steps} steps, {rep.n_episodes} episodes: {len(rep.outputs)} shards "
            f"and {rep.episodes_path} written in {rep.timings['total']:.2f}s{note}"
        )
    return 0


def _cmd_summary(args) -> int:
    from rollscan.stored.summary import format_text, load_episodes, summarise

    table = load_episodes(
        args.inputs, _names(args), chunk_steps=args.chunk_steps, progress=_progress(args)
    )
    if args.plot:
        from rollscan.stored.plot import plot

        plot(table, args.plot, inputs=args.inputs)
    stats = summarise(table)
    print(json.dumps(stats, indent=2) if args.json else format_text(stats))
    return 0


def _cmd_demo(args) -> int:
    from rollscan.stored.demo import run

    run(args.out, n_steps=args.steps, kernels=args.kernels)
    return 0


def _cmd_bench(args) -> int:
    from rollscan import bench  # written with the benchmark harness

    return int(bench.main(args.rest) or 0)


def main(argv=None) -> int:
    parser = build_parser()
    argv = sys.argv[1:] if argv is None else list(argv)
    if argv[:1] == ["bench"]:  # everything after `bench` belongs to the harness
        return _cmd_bench(argparse.Namespace(rest=argv[1:]))
    try:
        args = parser.parse_args(argv)
    except SystemExit as e:
        return int(e.code or 0)
    from rollscan.stored.errors import StoredError
    from rollscan.stored.interrupts import install

    restore = install()
    try:
        return {"process": _cmd_process, "summary": _cmd_summary, "demo": _cmd_demo}[args.command](
            args
        )
    except StoredError as e:
        print(f"rollscan {args.command}: error: {e}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(
            f"rollscan {args.command}: interrupted; unfinished outputs were removed",
            file=sys.stderr,
        )
        return 130
    finally:
        restore()


if __name__ == "__main__":
    sys.exit(main())
