"""``causeline``: train, explain (and later serve and group) from the command line.

Errors a user can fix print one line and exit with status 2; anything unexpected prints one line
too, with the traceback only when ``CAUSELINE_DEBUG=1``.
"""

from __future__ import annotations

import argparse
import os
import sys
import traceback
from collections.abc import Sequence
from pathlib import Path

from causeline.service.errors import CauselineError

EXIT_USER_ERROR = 2
EXIT_INTERNAL_ERROR = 3


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="causeline",
        description="Event prediction with exact reason codes, and root-cause groups.",
    )
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    draft = commands.add_parser(
        "draft", help="write a first data-set config from your own table, to edit and train")
    draft.add_argument("--data", required=True, type=Path, help="event table (CSV or Parquet)")
    draft.add_argument("--target", required=True, help="the 0/1 event column")
    draft.add_argument("--id", dest="id_column", help="row id column (default: the first "
                       "column with a distinct value on every row)")
    draft.add_argument("--time", help="event time column, if any")
    draft.add_argument("--entity", help="equipment or unit column, if any")
    draft.add_argument("--out", required=True, type=Path,
                       help="config to write (YAML); never overwritten")
    draft.set_defaults(run=_draft)

    train = commands.add_parser("train", help="train a bundle from a table of historical events")
    train.add_argument("--config", required=True, type=Path, help="data-set config (YAML)")
    train.add_argument("--data", type=Path, help="event table (CSV or Parquet)")
    train.add_argument("--out", required=True, type=Path, help="bundle folder to write")
    _raw_arguments(train, "instead of --data: ")
    train.set_defaults(run=_train)

    build = commands.add_parser(
        "build", help="build labelled snapshots from raw timelines (config's timeline section)"
    )
    build.add_argument("--config", required=True, type=Path, help="data-set config (YAML)")
    _raw_arguments(build, "")
    build.add_argument("--out", type=Path, help="snapshot table to write (CSV or Parquet)")
    build.add_argument(
        "--list-features", action="store_true",
        help="print the names of the features the timeline section builds, and stop",
    )
    build.set_defaults(run=_build)

    explain = commands.add_parser("explain", help="score events and attach reason codes")
    explain.add_argument("--bundle", required=True, type=Path, help="a trained bundle folder")
    explain.add_argument("--input", type=Path, help="CSV, JSONL or Parquet")
    explain.add_argument("--out", required=True, type=Path, help="CSV, JSONL or Parquet")
    explain.add_argument("--top", type=int, default=None, help="reason codes per event")
    _raw_arguments(explain, "instead of --input, for a bundle built from timelines: ")
    explain.add_argument(
        "--latest", action="store_true",
        help="with raw logs: score each entity once, now (its latest reading or failure, "
        "whichever is later); entities down then are listed in <out>.down.csv, not scored",
    )
    explain.add_argument(
        "--as-of", metavar="TIME",
        help="with raw logs: score each entity once, at this time (implies --latest)",
    )
    explain.add_argument(
        "--all-contributions",
        action="store_true",
        help="add every feature's contribution and the base value",
    )
    explain.add_argument(
        "--what-to-change", type=int, nargs="?", const=2, metavar="N",
        help="for events at or above the threshold, the cheapest change of at most N "
        "controllable features (default 2) that brings them below it, as the config's "
        "`change:` settings allow: a model estimate for qualified staff to review",
    )
    _engine_arguments(explain)
    explain.set_defaults(run=_explain)

    rootcause = commands.add_parser("rootcause", help="group events into root-cause groups")
    rootcause.add_argument("--bundle", required=True, type=Path, help="a trained bundle folder")
    rootcause.add_argument(
        "--events", type=Path,
        help="CSV, JSONL or Parquet table, or a prediction-log folder (needs --predicted)",
    )
    _raw_arguments(rootcause, "instead of --events, for a bundle built from timelines: ",
                   events=False)
    rootcause.add_argument("--out", required=True, type=Path, help="output folder")
    rootcause.add_argument(
        "--predicted", action="store_true",
        help="group rows scored at or above the threshold instead of labelled events",
    )
    rootcause.add_argument("--since", help="first time to include (inclusive)")
    rootcause.add_argument("--until", help="time to stop before (exclusive)")
    rootcause.add_argument("--previous", type=Path, help="previous run's folder, to keep ids")
    rootcause.add_argument("--min-group-size", type=int, help="override the smallest group size")
    _engine_arguments(rootcause)
    rootcause.add_argument(
        "--fit-sample", type=int, metavar="N",
        help="find the groups on at most N events with a cause (default 60000), drawn by a "
        "hash of their ids; the others join the nearest group",
    )
    rootcause.add_argument(
        "--quiet", action="store_true",
        help="no progress on standard error (steps, rows done, rate, time left)",
    )
    rootcause.set_defaults(run=_rootcause)

    effect = commands.add_parser(
        "effect", help="did the fix work: the change in the event rate after each kind of "
        "action, against entities not treated in the same weeks, beside the model's estimate")
    effect.add_argument("--config", required=True, type=Path, help="data-set config (YAML) "
                        "with a timeline section that tracks actions")
    _raw_arguments(effect, "")
    effect.add_argument("--bundle", type=Path, help="a bundle built from the same timelines, "
                        "for the model's own estimate beside each measured effect")
    effect.add_argument("--out", required=True, type=Path, help="output folder")
    effect.add_argument("--weeks-before", type=int, default=6, help="weeks compared before "
                        "the action's week (default 6)")
    effect.add_argument("--weeks-after", type=int, default=6, help="weeks compared after it "
                        "(default 6)")
    effect.add_argument("--bootstrap", type=int, default=999, help="bootstrap samples of "
                        "entities (or clusters) for the interval (default 999)")
    effect.add_argument("--level", type=float, default=0.95, help="interval level (0.95)")
    effect.add_argument("--cluster-by", metavar="COLUMN", help="a column of the attributes "
                        "whose entities share shocks (a store, a line): the bootstrap resamples "
                        "them together (default: the config's attributes.cluster_by, else each "
                        "entity alone)")
    effect.add_argument("--compare-within", metavar="COLUMN", help="a column of the "
                        "attributes (a store, a line): compare treated entities only with "
                        "untreated ones of their own group; 'fleet': across the whole fleet "
                        "(default: the config's attributes.compare_within, else the fleet)")
    effect.add_argument("--min-treated", type=int, default=10, help="fewest treated (and "
                        "comparison) entities for a number (default 10)")
    effect.add_argument("--seed", type=int, default=0, help="bootstrap seed (default 0)")
    effect.add_argument("--quiet", action="store_true", help="no progress on standard error")
    effect.set_defaults(run=_effect)
    _drift_parser(commands)

    serve = commands.add_parser(
        "serve", help="serve scores with reason codes over HTTP (settings: CAUSELINE_* variables)"
    )
    serve.add_argument("--bundle", type=Path, help="a bundle folder or a folder of bundles")
    serve.add_argument("--host", help="address to listen on (default 127.0.0.1)")
    serve.add_argument("--port", type=int, help="port (default 8000)")
    serve.add_argument("--workers", type=int, help="worker processes (default 1)")
    serve.set_defaults(run=_serve)
    return parser


def _raw_arguments(parser: argparse.ArgumentParser, prefix: str, events: bool = True) -> None:
    parser.add_argument("--readings", type=Path, help=prefix + "raw readings log")
    parser.add_argument("--failures", type=Path, help=prefix + "failure log")
    if events:  # --events names the events rootcause groups; it once meant the failure log
        parser.add_argument("--events", type=Path, dest="old_events", help=argparse.SUPPRESS)
    parser.add_argument("--actions", type=Path, help=prefix + "maintenance log")
    parser.add_argument("--attributes", type=Path, help=prefix + "static attributes per entity")


def _has_raw_logs(args: argparse.Namespace) -> bool:
    logs = ("readings", "failures", "old_events", "actions", "attributes")
    return any(getattr(args, name, None) is not None for name in logs)


def _raw_paths(args: argparse.Namespace):  # type: ignore[no-untyped-def]
    from causeline.service.features.logs import RawPaths

    if getattr(args, "old_events", None) is not None:
        raise CauselineError("the failure log is given with --failures (--events names the "
                             "events to group in causeline rootcause)")
    if args.readings is None:
        raise CauselineError("give --readings (and --failures, maybe --actions, --attributes)")
    return RawPaths(args.readings, args.failures, args.actions, args.attributes)


def _draft(args: argparse.Namespace) -> int:
    from causeline.training.draft import draft_config, write_draft

    draft = draft_config(args.data, args.target, args.id_column, args.time, args.entity)
    write_draft(draft, args.out)
    print(f"draft: {len(draft.features)} features -> {args.out}")
    for column in draft.left_out:
        print(f"left out {column.column!r}: {column.left_out}")
    print("next: edit the draft (units, roles, reason texts, fixes), then\n"
          f"  causeline train --config {args.out} --data {args.data} --out bundle")
    return 0


def _build(args: argparse.Namespace) -> int:
    from causeline.training.build import build, describe_counts
    from causeline.training.config import load_timeline

    if args.list_features:
        for name in load_timeline(args.config).feature_names:
            print(name)
        return 0
    if args.out is None:
        raise CauselineError("give --out (or --list-features)")
    result = build(args.config, _raw_paths(args), args.out)
    print(f"snapshots: {describe_counts(result.counts)}")
    for note in result.notes:
        print(f"note: {note}")
    print(f"wrote {len(result.table)} labelled snapshots -> {args.out}")
    return 0


def _train(args: argparse.Namespace) -> int:
    from causeline.training.pipeline import train, train_timeline

    raw = _has_raw_logs(args)
    if (args.data is None) == (not raw):
        raise CauselineError("give either --data or the raw logs (--readings, --failures, ...)")
    if raw:
        result = train_timeline(args.config, _raw_paths(args), args.out)
    else:
        result = train(args.config, args.data, args.out)
    manifest = result.manifest
    metrics = manifest.metrics
    print(f"bundle: {result.path} ({manifest.name} {manifest.version})")
    print(
        f"rows: {manifest.training['rows']}  events: {manifest.training['events']}  "
        f"split: {manifest.training['split']['method']}  trees: "
        f"{manifest.training['best_iteration']}"
    )
    for key in ("roc_auc", "pr_auc", "brier", "precision_at_threshold", "recall_at_threshold"):
        value = metrics.get(key)
        print(f"held-out {key}: {'n/a' if value is None else f'{value:.4f}'}")
    print(f"threshold: {manifest.decision.threshold:.4f} ({manifest.decision.rule})")
    if manifest.training.get("labels"):
        from causeline.training.build import describe_counts

        print(f"snapshots: {describe_counts(manifest.training['labels'])}")
    for note in result.notes:
        print(f"note: {note}")
    print(f"model card: {result.path / 'MODEL_CARD.md'}")
    raw = " --readings ... --failures ..." if manifest.training.get("labels") else \
        " --input new-events.csv"
    print(f"explain new data: causeline explain --bundle {result.path}{raw} --out scores.csv")
    return 0


def _explain(args: argparse.Namespace) -> int:
    from causeline.service.bundle.load import load_bundle
    from causeline.service.explain.job import explain_file
    from causeline.service.files.rejects import rejects_path

    if args.top is not None and args.top < 1:
        raise CauselineError("--top must be at least 1")
    bundle = load_bundle(args.bundle)
    if args.what_to_change is not None and args.what_to_change < 1:
        raise CauselineError("--what-to-change takes the most features to change, at least 1")
    if _use_dask(args):
        from causeline.service.dask.explain import explain_partitions

        _changes(args, bundle)  # the same one-line refusal without change settings
        totals = explain_partitions(
            bundle, args.input, args.out, args.top, args.all_contributions, _dask_settings(args),
            args.what_to_change,
        )
    else:
        totals = explain_file(
            bundle, args.out, args.input, _raw_paths(args) if _has_raw_logs(args) else None,
            args.top, args.all_contributions, args.latest, args.as_of, _changes(args, bundle),
        )
    print(f"explained: {totals.rows} events, {totals.flagged} at or above the threshold -> "
          f"{args.out}")
    if totals.warned:
        print(f"warnings: {totals.warned} events (see the warnings column)")
    if totals.leading:
        print("leading reason code of the flagged events:")
        for code, count in totals.leading.most_common(10):
            print(f"  {code:<28} {count:>7}  {100 * count / totals.flagged:5.1f} %")
    if totals.rejected:
        print(f"rejected: {totals.rejected} unreadable rows -> {rejects_path(args.out)}")
    if args.latest or args.as_of:
        from causeline.service.explain.job import down_path

        print(f"down (not scored): {totals.down} entities -> {down_path(args.out)}")
    return 0


def _changes(args: argparse.Namespace, bundle):  # type: ignore[no-untyped-def]
    """What --what-to-change adds to each explained event, or None without it."""
    if not args.what_to_change:
        return None
    if not any(f.change is not None for f in bundle.spec.features):
        raise CauselineError("--what-to-change: the bundle's config gives no controllable "
                             "feature a `change:` setting, so nothing may be changed (docs/"
                             "config.md, What to change)")
    from causeline.service.actions.search import ActionFinder, Actions
    from causeline.service.explain.explainer import Explainer

    explainer, finder = Explainer(bundle), ActionFinder(bundle, args.what_to_change)
    return lambda explanation: Actions.find(explainer, explanation, args.what_to_change, finder)


def _rootcause(args: argparse.Namespace) -> int:
    from causeline.service.bundle.load import load_bundle
    from causeline.service.rootcause.job import RootCauseOptions
    from causeline.service.rootcause.local import run_rootcause

    options = RootCauseOptions(
        predicted=args.predicted, since=args.since, until=args.until,
        previous=args.previous, min_group_size=args.min_group_size, fit_sample=args.fit_sample,
    )
    if (args.events is None) == (not _has_raw_logs(args)):
        raise CauselineError("give either --events or the raw logs (--readings, --failures, ...)")
    source = args.events if args.events is not None else _raw_paths(args)
    if _use_dask(args):
        from causeline.service.dask.rootcause import run_rootcause_dask

        if args.events is None:
            raise CauselineError("the dask engine reads --events tables; for raw logs use "
                                 "--engine local, or causeline build first")

        result = run_rootcause_dask(
            load_bundle(args.bundle), args.events, args.out, options, _dask_settings(args),
            progress=_progress(args),
        )
    else:
        result = run_rootcause(
            load_bundle(args.bundle), source, args.out, options, progress=_progress(args)
        )
    counts = result.summary["counts"]
    print(
        f"grouped {counts['events']} events: {counts['groups']} groups, "
        f"{counts['ungrouped']} ungrouped -> {args.out}"
    )
    if counts["rejected"]:
        print(f"rejected: {counts['rejected']} rows (reasons in {args.out / 'rejects.csv'})")
    if counts.get("repeats_dropped"):
        print(f"repeats dropped: {counts['repeats_dropped']} log entries (an event id counts "
              "once, by its latest entry)")
    for record in result.groups.to_dict("records"):
        status = record["status"] if isinstance(record["status"], str) else ""
        print(f"  {record['group_id']:<12} {status:<9} {record['events']:>7}  {record['label']}")
    print("Groups and events avoidable are model estimates, not a diagnosis.")
    return 0


def _effect(args: argparse.Namespace) -> int:
    from causeline.service.bundle.load import load_bundle
    from causeline.service.effect.job import NOTES_JOINED_BY, EffectOptions, run_effect
    from causeline.training.config import load_config

    options = EffectOptions(
        before=args.weeks_before, after=args.weeks_after, bootstrap=args.bootstrap,
        level=args.level, seed=args.seed, min_treated=args.min_treated,
        min_comparison=args.min_treated, cluster_by=args.cluster_by,
        compare_within=args.compare_within)
    options.check()
    spec = load_config(args.config)
    bundle = load_bundle(args.bundle) if args.bundle is not None else None
    result = run_effect(spec, _raw_paths(args), args.out, options, bundle, _progress(args))
    print(f"measured {int((result.table['status'] == 'measured').sum())} of {len(result.table)} "
          f"kinds of action -> {args.out}")
    for row in result.table.to_dict("records"):
        name = row["action_kind"] + (f" ({row['fix_kind']})" if row["fix_kind"] else "")
        if row["warning"]:
            print(f"  {name}: no number: {row['warning']}")
            continue
        line = (f"  {name}: {row['effect_per_1000']:+.1f} per 1,000 entity-days "
                f"({row['effect_low']:+.1f} to {row['effect_high']:+.1f}), "
                f"{row['treated_entities']} treated, {row['comparison_entities']} comparison")
        if row["model_effect_per_1000"] == row["model_effect_per_1000"]:
            line += f"; model {row['model_effect_per_1000']:+.1f}"
        print(line)
        for note in filter(None, row["note"].split(NOTES_JOINED_BY)):
            print(f"    note: {note}")
    print("Measured under parallel trends on past logs; see docs/effect.md before acting.")
    return 0
def _drift_parser(commands) -> None:  # type: ignore[no-untyped-def]
    drift = commands.add_parser(
        "drift", help="is the model still right? recent events against the training reference",
        description="Exit status: 0 ok, 10 watch, 11 retrain, 2 a problem you can fix.")
    drift.add_argument("--bundle", required=True, type=Path, help="a trained bundle folder")
    drift.add_argument("--input", required=True, type=Path,
                       help="CSV, JSONL or Parquet table, or a prediction-log folder")
    drift.add_argument("--out", required=True, type=Path, help="output folder")
    drift.add_argument("--since", help="first time to include (inclusive)")
    drift.add_argument("--until", help="time to stop before (exclusive)")
    drift.add_argument("--label", metavar="COLUMN",
                       help="0/1 outcome column: adds the calibration checks")
    drift.add_argument("--failures", metavar="LOG", type=Path,
                       help="failure log: outcomes for the calibration checks, each event "
                            "labelled as training labels snapshots (bundles trained from "
                            "timelines: horizon, failure types and columns from its timeline)")
    drift.add_argument("--against", choices=("training", "held-out"), default="training",
                       help="reference part for codes and scores (default: every training row)")
    drift.add_argument("--code-sample", type=int, default=200_000, metavar="N",
                       help="reason codes from a seeded random sample of N events (explaining "
                            "is what costs; scores and inputs count every event); 0: every event "
                            "(default 200,000)")
    drift.add_argument("--quiet", action="store_true", help="no progress on standard error")
    drift.set_defaults(run=_drift)


def _drift(args: argparse.Namespace) -> int:
    from causeline.service.bundle.load import load_bundle
    from causeline.service.drift.job import EXIT_CODES, DriftOptions, run_drift

    sample = None if args.code_sample == 0 else args.code_sample
    options = DriftOptions(since=args.since, until=args.until, label=args.label,
                           against=args.against, code_sample=sample, failures=args.failures)
    result = run_drift(load_bundle(args.bundle), args.input, args.out, options,
                       progress=_progress(args))
    window = result.summary["window"]
    print(f"checked {window['events']} events -> {args.out}")
    print(f"verdict: {result.verdict.level}")
    for item in result.verdict.decided_by[:12]:
        print(f"  {item['level']:<8} {item['area']:<12} {item['subject']:<28} {item['check']}")
    return EXIT_CODES[result.verdict.level]


def _serve(args: argparse.Namespace) -> int:
    from causeline.service.api.serve import run
    from causeline.service.api.settings import Settings

    flags = {"bundle": args.bundle, "host": args.host, "port": args.port, "workers": args.workers}
    run(Settings.from_env().with_flags(flags))
    return 0


def _engine_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--engine", choices=("local", "dask"), default="local",
        help="local: one process (default); dask: partitions on a Dask cluster",
    )
    parser.add_argument(
        "--scheduler", metavar="ADDRESS",
        help="Dask scheduler, e.g. tcp://host:8786 (default with --engine dask: a local cluster "
        "of 2 worker processes started for the run)",
    )
    parser.add_argument(
        "--partition-mb", type=float, metavar="MB",
        help="with --engine dask: input per partition, as a table in memory (Parquet) or as "
        "text (CSV); default 32. Smaller partitions need less memory per worker",
    )
    parser.add_argument(
        "--workers", type=int, metavar="N",
        help="with --engine dask and no --scheduler: worker processes of the local cluster "
        "(default 2)",
    )
    parser.add_argument(
        "--worker-memory", metavar="SIZE",
        help="with --engine dask and no --scheduler: memory limit per local worker, e.g. 4GiB "
        "(default 2GiB)",
    )


DASK_FLAGS = {"scheduler": "--scheduler", "partition_mb": "--partition-mb",
              "workers": "--workers", "worker_memory": "--worker-memory"}


def _use_dask(args: argparse.Namespace) -> bool:
    if args.engine != "dask":
        given = [flag for key, flag in DASK_FLAGS.items() if getattr(args, key) is not None]
        if given:
            raise CauselineError(f"{given[0]} needs --engine dask")
    return bool(args.engine == "dask")


def _dask_settings(args: argparse.Namespace):  # type: ignore[no-untyped-def]
    from causeline.service.dask.cluster import DaskSettings, memory_size

    if args.scheduler and (args.workers is not None or args.worker_memory is not None):
        raise CauselineError("--workers and --worker-memory size the local cluster; a cluster "
                             "at --scheduler is sized where it is started")
    if args.workers is not None and args.workers < 1:
        raise CauselineError("--workers must be at least 1")
    defaults = DaskSettings()
    return DaskSettings(
        scheduler=args.scheduler,
        workers=args.workers or defaults.workers,
        memory_limit=memory_size(args.worker_memory) if args.worker_memory
        else defaults.memory_limit,
        partition_mb=defaults.partition_mb if args.partition_mb is None else args.partition_mb,
    )


def _progress(args: argparse.Namespace):  # type: ignore[no-untyped-def]
    """Where a long command says how far it is: standard error, unless --quiet."""
    from causeline.service.progress import Console, Silent

    return Silent() if getattr(args, "quiet", False) else Console(sys.stderr)


def main(argv: Sequence[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    try:
        return int(args.run(args))
    except CauselineError as exc:
        print(f"causeline {args.command}: error: {exc}", file=sys.stderr)
        return EXIT_USER_ERROR
    except KeyboardInterrupt:
        print(f"causeline {args.command}: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # the last line of defence: no traceback for users
        if os.environ.get("CAUSELINE_DEBUG") == "1":
            traceback.print_exc()
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
        print(
            f"causeline {args.command}: internal error: {type(exc).__name__}: {first} "
            "(set CAUSELINE_DEBUG=1 for details)",
            file=sys.stderr,
        )
        return EXIT_INTERNAL_ERROR


if __name__ == "__main__":
    raise SystemExit(main())
