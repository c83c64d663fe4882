"""The `thresher` command line. Each verb answers from the store or runs the flow."""

from __future__ import annotations

import argparse
import atexit
import json
import logging
import os
import sys
import threading
from contextlib import contextmanager
from pathlib import Path
from typing import Any, NoReturn

from thresher.flows.config import ConfigError, FlowDefinition, load_definition
from thresher.flows.runtime import collect_after_imports
from thresher.steps.units import shown

EXIT_USAGE = 2


class UsageError(Exception):
    """Bad input from the user: printed as one line, exit code 2."""


class _Parser(argparse.ArgumentParser):
    _seen: list[str] = []

    def parse_known_args(self, args=None, namespace=None):  # type: ignore[override]
        self._seen = list(sys.argv[1:] if args is None else args)  # for error() below
        return super().parse_known_args(args, namespace)

    def error(self, message: str) -> NoReturn:  # one line, not argparse's usage dump
        if message.startswith(("the following arguments are required", "one of the arguments")):
            # argparse checks required options before unknown ones; a mistyped flag is
            # the likelier cause, so name it.
            unknown = [a for a in self._seen if a.startswith("-") and not a[1:2].isdigit() and a not in ("-", "--")
                       and a.split("=")[0] not in self._option_string_actions]
            if unknown:
                message = f"unrecognized arguments: {' '.join(unknown)}"
        self.exit(EXIT_USAGE, f"{self.prog}: {message} (see {self.prog} --help)\n")


def _common(p: argparse.ArgumentParser, json_flag: bool = True) -> None:
    p.add_argument("--config", metavar="FLOW.yaml", help="flow definition file (default: the embedded default)")
    p.add_argument("--store", metavar="DIR", help="store root (default: from the flow definition)")
    if json_flag:
        p.add_argument("--json", action="store_true", help="print the answer as JSON")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="thresher", description=(
        "Turn a shared drive of documents into clean, deduplicated, token-counted chunks "
        "with exact provenance, stage by stage in an auditable store."))
    sub = parser.add_subparsers(dest="verb", metavar="VERB", parser_class=_Parser)
    sub.required = True

    p = sub.add_parser("run", help="run the flow over the source folder", description=(
        "Run the chain (extract, clean, language, split, personal, dedup, tokens) over the source folder, "
        "skipping documents already processed with the same steps and parameters."))
    _common(p)
    p.add_argument("--source", metavar="DIR", help="source folder (default: from the flow definition)")
    p.add_argument("--workers", metavar="N", type=_positive_int, help="parallel tasks (default: from the flow definition)")
    p.add_argument("--force", action="store_true", help="process every document again, even unchanged ones")
    p.add_argument("--verify", action="store_true",
                   help="read and hash every file, even those whose size, times, inode and device are unchanged")
    p.add_argument("--dry-run", action="store_true",
                   help="scan and plan only: print what the run would process, remove and hold; change nothing")
    p.add_argument("--accept-removals", action="store_true",
                   help="remove the documents this run no longer finds even when they are more than "
                        "source.removal_limit of the drive")
    p.add_argument("--quiet", action="store_true", help="no progress lines, only the summary")
    p.add_argument("--probes", metavar="FILE", help="probe file to check after the run (default: the definition's probes)")
    p.add_argument("--fail-on-regression", action="store_true",
                   help="exit with status 3 when a probe that passed in the previous probed run fails now")

    p = sub.add_parser("status", help="recent runs and per stage the counts by status",
                       description="Recent runs, and for each stage the current units by status.")
    _common(p)
    p.add_argument("--runs", metavar="N", type=_positive_int, default=5, help="how many recent runs to list (default 5)")

    p = sub.add_parser("trail", help="one document's way through every stage",
                       description="Show one document's units at every stage, with status, reasons and warnings.")
    p.add_argument("document", metavar="DOC_ID|PATH", help="a doc_id (or a unique prefix of at least 6 characters) or a source path")
    _common(p)
    p.add_argument("--text", action="store_true", help="also print each unit's text")

    p = sub.add_parser("failures", help="failed and dropped units, grouped by reason",
                       description="Every failed or dropped unit of the live documents (the store's state after "
                                   "the latest run), grouped by reason.")
    _common(p)
    p.add_argument("--status", choices=["failed", "dropped", "all"], default="all",
                   help="which units to list (default: all)")

    p = sub.add_parser("rerun", help="re-run one step for chosen units, then what depends on them",
                       description=(
                           "Re-execute one step for a document, a page, or every failed unit, from the previous "
                           "stage's stored rows; then the later steps of those documents and the corpus-wide "
                           "steps as far as they are affected. Old attempts stay for audit."))
    _common(p)
    which = p.add_mutually_exclusive_group(required=True)
    which.add_argument("--doc", metavar="ID", help="the document's doc_id (or a unique prefix)")
    which.add_argument("--path", metavar="P", help="the document's source path")
    which.add_argument("--failed", action="store_true", help="every failed unit of the live documents")
    which.add_argument("--damaged", action="store_true",
                       help="every document whose stored rows `thresher verify` finds damaged or missing")
    p.add_argument("--page", metavar="N", type=_positive_int, help="only this page (1-based)")
    p.add_argument("--step", metavar="NAME", help="the step to start from (default: the first one that failed)")
    p.add_argument("--source", metavar="DIR", help="source folder (default: the one the latest run read)")
    p.add_argument("--quiet", action="store_true", help="no progress lines, only the summary")

    p = sub.add_parser("report", help="write the review pages (a summary file and a folder of pages beside it)",
                       description="Write the review pages: FILE is the summary (figures, charts, problems by "
                                   "reason, the documents that need a look) and the folder beside it (FILE's name "
                                   "without .html, plus -pages) holds one page per document, with each page's text "
                                   "before and after, and the full documents list. Pages of documents the store "
                                   "holds nothing new for since the last report into that folder are kept as they "
                                   "are. No script; nothing is fetched.")
    _common(p, json_flag=False)
    p.add_argument("--out", metavar="FILE", default="report.html",
                   help="summary file to write; its pages go to the folder FILE-without-.html-pages "
                        "(default: report.html and report-pages/)")
    p.add_argument("--run", metavar="RUN_ID",
                   help="a committed run to show as it left the store (default: the state of the store, "
                        "the latest run and the reruns after it)")

    p = sub.add_parser("export", help="write the live chunks as Parquet or JSONL",
                       description="Write the hand-off's live chunks to a file, as Parquet or JSON Lines.")
    _common(p, json_flag=False)
    p.add_argument("--format", choices=["parquet", "jsonl"], required=True, help="file format")
    p.add_argument("--out", metavar="PATH", required=True, help="file to write ('-' for standard output, jsonl only)")

    p = sub.add_parser("deliver", help="apply committed runs' change sets to the definition's targets",
                       description=(
                           "Bring each delivery target named in the definition (deliver.targets) to the latest "
                           "committed run: the change sets of the runs it lacks, in run order, in one transaction, "
                           "or a full load from the hand-off when it is new or too far behind. Applying again is "
                           "a no-op."))
    _common(p)
    p.add_argument("--target", metavar="NAME", action="append", help="only this target (repeatable)")

    p = sub.add_parser("verify", help="check that the store is intact; one line per problem",
                       description=(
                           "Check every file a committed run or compaction recorded (exists, size, SHA-256), every "
                           "ledger against its part, every hand-off chunk back to the first stage, and the catalog "
                           "against the current view. Exit 0 when intact, 1 when a problem is found."))
    _common(p)

    p = sub.add_parser("compact", help="rewrite a stage's many small part files into few large ones",
                       description=(
                           "Rewrite the rows of every stage (or the named ones) into few large part files sorted by "
                           "document, without changing any row or the current view. Runs also do this by themselves "
                           "when a stage passes housekeeping: compact_parts files."))
    _common(p)
    p.add_argument("--stage", metavar="NAME", action="append", help="only this stage (may repeat)")

    p = sub.add_parser("retain", help="remove old attempts, keeping recent runs and the current view",
                       description=(
                           "Keep every row of the last N committed runs (or of runs started since a date), and always "
                           "the current view and the current hand-off; remove older attempts, and the manifests and "
                           "folders of old runs that no longer hold any row; remove change sets beyond their own limit."))
    _common(p)
    p.add_argument("--keep-runs", metavar="N", type=_positive_int, help="keep the attempts of the last N runs")
    p.add_argument("--since", metavar="DATE", type=_date, help="keep the attempts of runs started on or after DATE (YYYY-MM-DD)")
    p.add_argument("--keep-changes", metavar="N", type=_positive_int,
                   help="keep the change sets of the last N runs (default: as many as the runs kept)")
    p.add_argument("--dry-run", action="store_true", help="print what would go and the bytes freed; change nothing")

    p = sub.add_parser("schedule", help="serve the weekly deployment named in the flow definition",
                       description=(
                           "Register the flow definition's deployment with its cron schedule and time zone on "
                           "the Prefect API (embedded, or PREFECT_API_URL) and serve its runs until stopped."))
    _common(p, json_flag=False)
    p.add_argument("--source", metavar="DIR", help="source folder (default: from the flow definition)")
    p.add_argument("--workers", metavar="N", type=_positive_int, help="parallel tasks (default: from the flow definition)")
    return parser


def _positive_int(value: str) -> int:
    try:
        n = int(value)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {value!r}") from None
    if n < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1, got {n}")
    return n


def _date(value: str):
    from datetime import datetime, timezone

    try:
        d = datetime.fromisoformat(value)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a date like 2026-01-31, got {value!r}") from None
    return d if d.tzinfo else d.replace(tzinfo=timezone.utc)


def _definition(args: argparse.Namespace) -> FlowDefinition:
    try:
        return load_definition(args.config)
    except ConfigError as exc:
        raise UsageError(str(exc)) from None


def _store_root(args: argparse.Namespace, definition: FlowDefinition) -> str:
    return args.store or definition.model.store


def _open_store(args: argparse.Namespace, definition: FlowDefinition):
    from thresher.flows.store import Store

    root = _store_root(args, definition)
    store = Store(root)
    if not store.runs():
        raise UsageError(f"no committed run in store {root}; run `thresher run` first")
    return store


# ----------------------------------------------------------------------------- run

def cmd_run(args: argparse.Namespace) -> int:
    definition = _definition(args)
    source = args.source or definition.model.source.root
    if not Path(source).is_dir():
        raise UsageError(f"source folder not found: {source}")
    store_root = _store_root(args, definition)
    if Path(store_root).exists() and not Path(store_root).is_dir():
        raise UsageError(f"store path exists and is not a folder: {store_root}")
    if args.dry_run:
        return _dry_run(args, definition, source, store_root)
    # The warm workers start now, if the run surely has documents to process: their fork
    # server's preload (1.3 s on 2 cores) then overlaps the checks below, Prefect's import
    # and its start of the flow. Started after the health check, it still held up a first
    # run's first document by 0.56 s.
    from thresher.flows.execute import prewarm_run

    if not os.environ.get("PREFECT_API_URL"):
        _need_prefect_api()  # a local port: microseconds to ask, so no worker starts for nothing
    prewarm_run(definition, source, store_root, args.workers, args.force)
    try:
        _run_checks(args, definition)
    except UsageError:
        from thresher.flows.isolate import close_idle

        close_idle()  # refused: its one line, not the fork server's traceback
        raise
    if not args.quiet:
        print(f"thresher: running {definition.model.name} on {source} -> store {store_root} "
              "(starting embedded Prefect unless PREFECT_API_URL is set)", file=sys.stderr, flush=True)
    return _run_and_report(args, definition, source, store_root, workers=args.workers, force=args.force,
                           probes=args.probes, verify=args.verify, accept_removals=args.accept_removals)


def _dry_run(args: argparse.Namespace, definition: FlowDefinition, source: str, store_root: str) -> int:
    from dataclasses import asdict

    from thresher.flows.preview import preview, preview_lines

    collect_after_imports()
    p = preview(definition, source, store_root, force=args.force, verify=args.verify)
    if args.json:
        print(json.dumps(asdict(p), indent=2))
    else:
        print(f"dry run of {definition.model.name} on {source} (store {store_root}): nothing was written")
        print("\n".join(preview_lines(p)))
    return 0


def _run_checks(args: argparse.Namespace, definition: FlowDefinition) -> None:
    """What `run` refuses before starting Prefect: a missing encoding, a bad probe file,
    no Prefect server to reach."""
    from thresher.flows.encodings import EncodingUnavailable, check_encoding

    for step in definition.steps:
        for name in step.spec.encoding_params:
            value = getattr(step.params, name)
            for enc in ([value] if isinstance(value, str) else list(value)):
                try:
                    check_encoding(enc)
                except EncodingUnavailable as exc:
                    raise UsageError(str(exc).replace("\n", " ")) from None

    probe_file = args.probes or definition.model.probes
    if probe_file:
        from thresher.flows.probes import ProbeError, load_probes

        try:
            load_probes(probe_file)
        except ProbeError as exc:
            raise UsageError(str(exc)) from None
    elif args.fail_on_regression:
        raise UsageError("--fail-on-regression needs probes: --probes FILE or `probes:` in the definition")
    _need_prefect_api()


def _run_and_report(args: argparse.Namespace, definition: FlowDefinition, source: str, store_root: str,
                    **options: Any) -> int:
    """Run the flow, then print its manifest (--json) or the summary."""
    from thresher.flows import pipeline
    from thresher.flows.plan import TooManyRemovals
    from thresher.flows.rerun import RerunError
    from thresher.flows.store import StoreError

    _need_prefect_api()
    try:
        manifest = pipeline.run(definition, source, store_root, quiet=args.quiet,
                                live=not getattr(args, "json", False), **options)
    except (StoreError, RerunError, TooManyRemovals) as exc:
        raise UsageError(str(exc)) from None
    if args.json:
        print(json.dumps(manifest, indent=2, default=str))
    else:
        print("\n".join(run_summary_lines(manifest)))
    delivered = manifest.get("delivered")
    if delivered and delivered.get("error"):
        print(f"thresher {args.verb}: the run is committed, but delivery failed: {delivered['error']}; "
              "`thresher deliver` tries again", file=sys.stderr)
        return 1
    probes = manifest.get("probes") or {}
    if getattr(args, "fail_on_regression", False) and probes.get("regressions"):
        print(f"thresher {args.verb}: {len(probes['regressions'])} probe(s) that passed in run "
              f"{probes.get('previous_run')} fail now: {', '.join(map(str, probes['regressions']))}",
              file=sys.stderr)
        return 3
    return 0


_checked_api: set[str | None] = set()  # the PREFECT_API_URL found reachable by this process


def _need_prefect_api() -> None:
    """Fail at once, in one line, where embedded Prefect cannot start or the user's
    Prefect server (PREFECT_API_URL) does not answer. Asked once per process: the
    health check costs a served run a tenth of a second or more."""
    from thresher.flows.runtime import NO_LOCAL_PORT, api_unreachable, embedded_server_possible

    url = os.environ.get("PREFECT_API_URL")
    if url in _checked_api:
        return
    if url:
        problem = api_unreachable(url)
        if problem:
            raise UsageError(problem)
    elif not embedded_server_possible():
        raise UsageError(NO_LOCAL_PORT)
    _checked_api.add(url)


def run_summary_lines(m: dict[str, Any]) -> list[str]:
    from thresher.flows.summary import STATUS_ORDER

    d = m["documents"]
    lines = [
        f"{m.get('kind', 'run')} {m['run_id']} finished in {m['seconds']:.1f} s",
        (f"  documents  re-ran {d['processed']} of {d['distinct']} live documents"
         if m.get("kind") == "rerun" else
         f"  documents  {d['files']} files, {d['distinct']} distinct"
         + (f" ({d['inside']} inside other documents)" if d.get("inside") else "")
         + f"; {d['processed']} processed, "
         f"{d['unchanged']} unchanged, {d['removed']} removed"
         + (f", {d['held']} held (unreadable this run, kept as stored)" if d.get("held") else "")),
        f"  hand-off   {m['chunks']} chunks, {m['tokens']:,} tokens "
        f"({m['changes']['upsert']} to upsert, {m['changes']['delete']} to delete)",
        "  stage       units  by status (current view)",
    ]
    units = {s["name"]: s["unit"] for s in m["definition"]["steps"]}
    for stage, by_status in m["current"].items():
        total = sum(by_status.values())
        parts = ", ".join(f"{by_status[s]} {s}" for s in STATUS_ORDER if by_status.get(s))
        lines.append(f"  {stage:<10} {total:>6} {units.get(stage, ''):<7} {parts or 'none'}")
    lines.append(f"  store      {m['store_root']}")
    probes = m.get("probes")
    if probes:
        regress = probes.get("regressions") or []
        lines.append(f"  probes     {probes['count']} questions: {probes['hit_at_1']:.0%} answered first, "
                     f"{probes['hit_at_5']:.0%} within 5" + (f"; {len(regress)} regression(s): probe "
                                                          + ", ".join(map(str, regress)) if regress else ""))
    for t in (m.get("delivered") or {}).get("targets", []):
        what = ("already up to date" if t["mode"] == "up to date" else
                f"full load of {t['upserts']} chunks" if t["mode"] == "full load" else
                f"{len(t['runs'])} run(s): {t['upserts']} upserted, {t['deletes']} deleted")
        lines.append(f"  delivered  {t['target']}: {what}" + (f"; holds {t['rows']} chunks" if t["rows"] is not None else ""))
    withheld = m.get("withheld") or {}
    if withheld:
        lines.append(f"  {len(withheld)} document(s) left out of the hand-off:")
        for path, why in sorted(withheld.items())[:10]:
            lines.append(f"    {shown(path)}  {why}")
        if len(withheld) > 10:
            lines.append(f"    ... and {len(withheld) - 10} more")
    unread = m.get("scan_problems") or []
    if unread:
        lines.append(f"  {len(unread)} file(s) the scan could not read:")
        for p in unread[:10]:
            lines.append(f"    {shown(p['source_path'])}  {p['reason']}")
        if len(unread) > 10:
            lines.append(f"    ... and {len(unread) - 10} more")
    if m.get("failures"):
        lines.append(f"  {m['failures']} unit(s) failed this run; `thresher trail PATH` shows each one's way:")
        first = m.get("failed_units", [])[:10]
        width = max((len(shown(f["source_path"])) for f in first), default=0)
        for f in first:
            lines.append(f"    {shown(f['source_path']):<{width}}  {f['stage']}: {f['reason']}")
        if m["failures"] > len(first):
            lines.append(f"    ... and {m['failures'] - len(first)} more")
    return lines


# ----------------------------------------------------------------------------- status

def cmd_status(args: argparse.Namespace) -> int:
    from dataclasses import asdict

    from thresher.flows.summary import (chunks_by_label, format_judgements, format_stage_counts, judgements,
                                        live_doc_ids, stage_counts, stages_of, token_totals)

    definition = _definition(args)
    store = _open_store(args, definition)
    runs = store.runs()
    latest = runs[-1].manifest
    docs = live_doc_ids(store)
    counts = stage_counts(store, stages_of(latest), docs)
    recent = runs[-args.runs:][::-1]
    tokens = token_totals(store)
    labels = chunks_by_label(store)
    judged = judgements(store, stages_of(latest), docs)
    if args.json:
        print(json.dumps({
            "store": store.root,
            "runs": [{"run_id": r.run_id, "kind": r.manifest.get("kind"), "finished_at": r.manifest.get("finished_at"),
                      "seconds": r.manifest.get("seconds"), "documents": r.manifest.get("documents"),
                      "chunks": r.manifest.get("chunks"), "tokens": r.manifest.get("tokens"),
                      "failures": r.manifest.get("failures")} for r in recent],
            "live_documents": len(docs),
            "stages": {c.stage: c.by_status for c in counts},
            "probes": next((r.manifest["probes"] for r in reversed(runs) if r.manifest.get("probes")), None),
            "targets": _target_states(definition, store),
            "tokens": None if tokens is None else {
                "encoding": tokens.encoding, "total": tokens.total, "chunks": tokens.chunks,
                "documents": tokens.documents, "by_language": tokens.by_language, "by_folder": tokens.by_folder},
            "chunks_by_label": labels,
            "judgements": asdict(judged),
        }, indent=2, default=str))
        return 0
    print(f"store {store.base}: {len(runs)} committed run(s), {len(docs)} live documents")
    print("recent runs:")
    for r in recent:
        m = r.manifest
        d = m.get("documents", {})
        print(f"  {r.run_id}  {m.get('kind', 'run'):<5} {m.get('finished_at', '')[:19]}  "
              f"{m.get('seconds', 0):6.1f} s  {d.get('processed', 0)} processed, {d.get('unchanged', 0)} unchanged, "
              + "".join(f"{d[k]} {k}, " for k in ("removed", "held") if d.get(k))
              + f"{m.get('chunks', 0)} chunks, {m.get('tokens', 0):,} tokens, {m.get('failures', 0)} failed units")
    print("current view by stage:")
    print("\n".join(format_stage_counts(counts)))
    print("judgements (see the README's 'Judgements' for how to overrule each):")
    print("\n".join(format_judgements(judged)))
    if tokens is not None and tokens.chunks:
        print(f"hand-off: {tokens.chunks} chunks from {tokens.documents} documents, {tokens.total:,} tokens "
              f"({tokens.encoding})")

        def share(parts: dict[str, int], limit: int = 8) -> str:
            items = list(parts.items())
            text = ", ".join(f"{k} {v:,}" for k, v in items[:limit])
            return text + (f", {len(items) - limit} more" if len(items) > limit else "")

        print(f"  by language: {share(tokens.by_language)}")
        print(f"  by folder:   {share(tokens.by_folder)}")
        if labels:
            print(f"  by label:    {share(labels)}")
    probed = next((r.manifest["probes"] for r in reversed(runs) if r.manifest.get("probes")), None)
    if probed:
        print(f"probes: {probed['count']} questions, {probed['hit_at_1']:.0%} answered first, "
              f"{probed['hit_at_5']:.0%} within 5, {len(probed['regressions'])} regression(s)")
    for t in _target_states(definition, store):
        print(f"target {t['name']} ({t['kind']}): " + (t["problem"] or (
            "up to date" if t["behind"] == 0 else f"{t['behind']} run(s) behind"
            + (f" (holds {t['applied']})" if t["applied"] else " (empty)"))))
    return 0


def _target_states(definition: FlowDefinition, store) -> list[dict[str, Any]]:
    from dataclasses import asdict

    from thresher.flows.deliver import target_states

    return [asdict(t) for t in target_states(definition, store)]


# ----------------------------------------------------------------------------- trail

def _resolve(store, definition: FlowDefinition, ref: str) -> tuple[str, list[dict[str, Any]]]:
    from thresher.flows.lookup import NotFound, resolve_document, source_roots

    try:
        return resolve_document(store, ref, source_roots(store, definition.model.source.root))
    except NotFound as exc:
        raise UsageError(str(exc)) from None


def _unit_detail(stage: str, row: dict[str, Any]) -> str:
    bits = []
    if row.get("language") and stage != "extract":
        prob = row.get("language_prob")
        bits.append(f"{row['language']}" + (f" {prob:.2f}" if prob is not None else ""))
    for key, label in (("method", "method"), ("word_count", "words"), ("chars_removed", "chars removed")):
        if row.get(key) not in (None, "", 0):
            bits.append(f"{label} {row[key]}")
    if row.get("fixes"):
        fixes = dict(row["fixes"])
        bits.append("fixes " + ", ".join(f"{k} {v}" for k, v in sorted(fixes.items())))
    if row.get("chunk_id") is not None:
        if row.get("token_count") is not None:
            bits.append(f"{row['token_count']} tokens")
        first, last = row.get("page_start"), row.get("page_end")
        if first:
            bits.append(f"page {first}" if first == last else f"pages {first}-{last}")
        if row.get("heading_path"):
            bits.append(" > ".join(row["heading_path"]))
    return "; ".join(str(b) for b in bits)


def cmd_trail(args: argparse.Namespace) -> int:
    from collections import Counter

    from thresher.flows.summary import STATUS_ORDER, stages_of

    definition = _definition(args)
    store = _open_store(args, definition)
    doc_id, cat_rows = _resolve(store, definition, args.document)
    stages = stages_of(store.latest_run().manifest)
    per_stage = {}
    for name, unit in stages:
        rows = store.current(name, unit, [doc_id]).to_pylist()
        rows.sort(key=lambda r: (r.get("chunk_index") or 0, r.get("page") or 0, r["locator"]))
        per_stage[name] = rows
    if args.json:
        # Signatures and fingerprints are for the machine that compares, not a reader.
        from thresher.flows.schema import MACHINE_COLUMNS

        slim = {name: [{k: v for k, v in r.items() if k not in MACHINE_COLUMNS} for r in rows]
                for name, rows in per_stage.items()}
        print(json.dumps({"doc_id": doc_id, "catalog": cat_rows, "stages": slim}, indent=2, default=str))
        return 0
    present = [r for r in cat_rows if r["present"]]
    print(shown((present or cat_rows)[0]["source_path"]))
    print(f"  doc_id {doc_id}")
    if present:
        r = present[0]
        print(f"  {r['size']:,} bytes, first seen in run {r['first_run']}, last seen in run {r['last_run']}")
        if len(present) > 1:
            others = ", ".join(shown(x["source_path"]) for x in present[1:])
            live = r["canonical_path"]
            print(f"  the same bytes sit at {len(present)} paths; also at {others}")
            print(f"  the hand-off names {'this path' if live == r['source_path'] else shown(live)} for all of them "
                  f"(source.archive_folders, source.copies_by)")
        catalog = store.catalog().to_pylist()
        for c in present:
            if c.get("container_doc_id"):
                holder = next((x["canonical_path"] for x in catalog if x["doc_id"] == c["container_doc_id"]
                               and x["present"]), c["container_doc_id"])
                print(f"  inside {shown(holder)} (doc_id {c['container_doc_id'][:12]}) as {shown(c['member_name'])}")
        inside = sorted(x["source_path"] for x in catalog if x.get("container_doc_id") == doc_id and x["present"])
        if inside:
            print(f"  holds {len(inside)} document(s): {', '.join(map(shown, inside[:10]))}"
                  + (f" and {len(inside) - 10} more" if len(inside) > 10 else ""))
    else:
        print("  removed from the source folder (no present path)")
    for line in _access_lines(present):
        print(line)
    limited = {s["name"]: s.get("formats") or [] for s in store.latest_run().manifest["definition"]["steps"]}
    fmt = next((r.get("format") for rows in per_stage.values() for r in rows if r.get("format")), None)
    for n, (name, unit) in enumerate(stages):
        rows = per_stage[name]
        if not rows and limited.get(name) and fmt not in limited[name]:
            print(f"{name}: passed by (applies to {', '.join(limited[name])} documents only)")
            continue
        if not rows:
            rest = [s for s, _ in stages[n:]]
            if all(not per_stage[s] for s in rest):
                print(f"{', '.join(rest)}: no units (nothing ok reached {'them' if len(rest) > 1 else 'it'})")
                break
        if unit == "chunks":  # the chunk stages follow one another: each chunk once, with every decision
            _print_chunks([s for s, u in stages[n:] if u == "chunks"], stages, per_stage, args.text)
            break
        by_status = Counter(r["status"] for r in rows)
        summary = ", ".join(f"{by_status[s]} {s}" for s in STATUS_ORDER if by_status.get(s))
        print(f"{name}: {len(rows)} {'page' if unit == 'pages' else 'chunk'} unit(s){': ' + summary if summary else ''}")
        for row in rows:
            where = row["locator"]
            line = f"  {where:<12} {row['status']:<8} {_unit_detail(name, row)}"
            print(line.rstrip())
            if row.get("reason"):
                print(f"    reason: {row['reason']}")
            for w in row.get("warnings") or []:
                print(f"    warning: {w}")
            if args.text and row.get("text"):
                for t in row["text"].splitlines():
                    print(f"    | {t}")
            for line in _finding_lines(row, stages, per_stage, name):
                print(line)
    return 0


def _access_lines(present: list[dict[str, Any]]) -> list[str]:
    """Who may read the document, which rule said so, and the file system's facts."""
    from thresher.flows.access import document_access
    from thresher.flows.config import AccessSection

    if not present or present[0].get("access_rule") is None:
        return []
    readers, label, rule = document_access(present, AccessSection())[present[0]["doc_id"]]
    lines = [f"  access: {', '.join(readers) if readers else 'nobody (left out of the hand-off)'}"
             f"{'; label ' + label if label else ''} (from {rule})"]
    for r in present:
        if r.get("mode") is not None:
            acl = f"; ACL {', '.join(r['acl'])}" if r.get("acl") else ""
            lines.append(f"    {shown(r['source_path'])}: owner {r['owner']} ({r['owner_uid']}), group {r['group']} "
                         f"({r['group_gid']}), mode {r['mode']:04o}{acl}; gives {', '.join(r['readers']) or 'nobody'}"
                         f" by {r['access_rule']}")
    return lines


def _print_chunks(names: list[str], stages, per_stage: dict[str, list[dict[str, Any]]], show_text: bool) -> None:
    """Each chunk once: what every chunk stage decided, the latest stage's details, all reasons."""
    from collections import Counter

    from thresher.flows.summary import STATUS_ORDER

    def counts(rows: list[dict[str, Any]]) -> str:
        c = Counter(r["status"] for r in rows)
        return ", ".join(f"{c[s]} {s}" for s in STATUS_ORDER if c.get(s)) or "none"

    chunks: dict[str, dict[str, dict[str, Any]]] = {}
    for name in names:
        for r in per_stage[name]:
            chunks.setdefault(r["locator"], {})[name] = r
    print(f"chunks: {len(chunks)} through {', '.join(names)} "
          f"({'; '.join(f'{name} {counts(per_stage[name])}' for name in names)})")
    for loc, by_stage in chunks.items():
        reached = [name for name in names if name in by_stage]
        if all(by_stage[name]["status"] == "ok" for name in reached):
            decided = "ok"
        else:
            decided = ", ".join(f"{name} {by_stage[name]['status']}" for name in reached)
        last = by_stage[reached[-1]]
        print(f"  {loc:<12} {decided:<8}  {_unit_detail(reached[-1], last)}".rstrip())
        for name in reached:
            r = by_stage[name]
            if r.get("reason"):
                print(f"    {name} reason: {r['reason']}")
            for w in r.get("warnings") or []:
                print(f"    {name} warning: {w}")
        # Findings once, from the first stage that recorded them (later stages carry them on).
        found = next((name for name in reached if by_stage[name].get("personal_findings")), None)
        if found:
            for line in _finding_lines(by_stage[found], stages, per_stage, found):
                print(line)
        if show_text and last.get("text"):
            for t in last["text"].splitlines():
                print(f"    | {t}")


def _finding_lines(row: dict[str, Any], stages, per_stage, name: str) -> list[str]:
    """Each personal-data finding's page and offsets; the value only here, on the terminal."""
    from thresher.flows.findings import place

    findings = row.get("personal_findings")
    if not findings:
        return []
    names = [s for s, _ in stages]
    at = names.index(name)
    # The page stage split read, and the chunk's original text as split cut it.
    page_stage = next((s for s, unit in reversed(stages[:at]) if unit == "pages"), None)
    split_rows = next((per_stage[s] for s, unit in stages[:at] if unit == "chunks"), [])
    original = next((r.get("text") or "" for r in split_rows if r.get("chunk_id") == row.get("chunk_id")), "")
    pages = sorted(((r.get("page"), r.get("text") or "") for r in per_stage.get(page_stage, []) if r["status"] == "ok"),
                   key=lambda p: p[0] or 0)
    lines = []
    for f, raw in zip(place(findings, row, pages), findings):
        where = "file" if f.page is None else f"page {f.page}"
        if f.in_prefix:
            where += " (repeated table header)"
        value = original[raw["start"]:raw["end"]]
        lines.append(f"    {f.kind}: {where} chars {f.start}-{f.end}: {value}")
    return lines


# ----------------------------------------------------------------------------- failures

def cmd_failures(args: argparse.Namespace) -> int:
    from thresher.flows.failures import failure_groups

    definition = _definition(args)
    store = _open_store(args, definition)
    statuses = ("failed", "dropped") if args.status == "all" else (args.status,)
    groups = failure_groups(store, statuses)
    if args.json:
        print(json.dumps([{"stage": g.stage, "status": g.status, "reason": g.kind, "count": len(g.units),
                           "units": g.units} for g in groups], indent=2, default=str))
        return 0
    if not groups:
        print("no failed or dropped units in the live documents")
        return 0
    total = sum(len(g.units) for g in groups)
    print(f"{total} unit(s) in {len(groups)} group(s); `thresher trail PATH` shows a document's way, "
          "`thresher rerun --failed` re-runs every failed unit")
    # One header per stage and status; under it one entry per kind of reason.
    last = None
    for g in groups:
        if (g.stage, g.status) != last:
            last = (g.stage, g.status)
            same = [h for h in groups if (h.stage, h.status) == last]
            docs = {d for h in same for d in h.documents}
            print(f"\n{g.status} at {g.stage}: {sum(len(h.units) for h in same)} unit(s) in {len(docs)} document(s)")
        reasons = {u["reason"] for u in g.units}
        if len(reasons) == 1:
            print(f"  reason: {g.units[0]['reason']}")
        else:  # the same kind of reason with different ids, paths or numbers: show the first in full
            print(f"  {len(g.units)} units with reasons like: {g.units[0]['reason']}")
        for u in g.units[:8]:
            print(f"    {shown(u['source_path'])}  {u['locator']}")
        if len(g.units) > 8:
            print(f"    ... and {len(g.units) - 8} more")
    return 0


# ----------------------------------------------------------------------------- rerun

def cmd_rerun(args: argparse.Namespace) -> int:
    definition = _definition(args)
    store = _open_store(args, definition)
    latest = store.latest_run().manifest
    source = args.source or latest.get("source_root") or definition.model.source.root
    if not Path(source).is_dir():
        raise UsageError(f"source folder not found: {source}")
    if args.step is not None and args.step not in [s.name for s in definition.steps]:
        raise UsageError(f"no step {args.step!r} in the flow definition; steps are "
                         f"{', '.join(s.name for s in definition.steps)}")
    if args.damaged:
        if args.page is not None or args.step is not None:
            raise UsageError("--damaged re-runs each document from its damaged step; --page and --step go with --doc or --path")
        from thresher.flows.verify import damaged_documents, verify

        damaged = damaged_documents(verify(store), [s.name for s in definition.steps])
        if not damaged:
            print("no damaged or missing part holds a live document; nothing to re-run")
            return 0
        return _run_and_report(args, definition, source, _store_root(args, definition), rerun={"damaged": damaged})
    if args.failed:
        if args.page is not None or args.step is not None:
            raise UsageError("--failed re-runs every failed unit from where it failed; --page and --step go with --doc or --path")
        from thresher.flows.failures import failure_groups

        if not failure_groups(store, ("failed",)):
            print("nothing failed in the live documents; nothing to re-run")
            return 0
        rerun: dict[str, Any] = {"failed": True}
    else:
        doc_id, rows = _resolve(store, definition, args.doc or args.path)
        if not any(r["present"] for r in rows):
            raise UsageError(f"{rows[0]['source_path']} is no longer in the source folder; nothing to re-run")
        if args.page is not None:
            pages = store.current(definition.steps[0].name, "pages", [doc_id], columns=["page", "page_count"]).to_pylist()
            count = max((r["page_count"] or 0 for r in pages), default=0) if pages and "page_count" in pages[0] else 0
            if not any(r["page"] for r in pages):
                raise UsageError(f"{rows[0]['source_path']} has no pages (only PDFs do); leave out --page")
            if count and args.page > count:
                raise UsageError(f"page {args.page}: {rows[0]['source_path']} has {count} pages")
        # Answers name the path the user gave, even where another copy is the live path.
        rerun = {"doc_id": doc_id, "page": args.page, "step": args.step, "path": rows[0]["source_path"]}
    return _run_and_report(args, definition, source, _store_root(args, definition), rerun=rerun)


# ----------------------------------------------------------------------------- export

def cmd_export(args: argparse.Namespace) -> int:
    from thresher.flows.export import export_chunks

    definition = _definition(args)
    store = _open_store(args, definition)
    # Arguments first: a refused export reads nothing (and starts no Arrow threads).
    if args.out == "-" and args.format != "jsonl":
        raise UsageError("only --format jsonl can be written to standard output")
    table = store.handoff()
    if table is None:
        raise UsageError("the store has no hand-off yet; run `thresher run` first")
    try:
        n = export_chunks(table, args.format, args.out)
    except BrokenPipeError:
        raise  # `export --out - | head`: the reader has what it wanted (see main)
    except OSError as exc:
        raise UsageError(f"cannot write {args.out}: {exc.strerror or exc}") from None
    if args.out != "-":
        print(f"wrote {n} chunks to {args.out} ({args.format})", file=sys.stderr)
    return 0


# ----------------------------------------------------------------------------- report

def cmd_report(args: argparse.Namespace) -> int:
    from thresher.flows.report import ReportError, write_report

    definition = _definition(args)
    store = _open_store(args, definition)
    try:
        done = write_report(store, args.out, run_id=args.run)
    except ReportError as exc:
        raise UsageError(str(exc)) from None
    except OSError as exc:
        raise UsageError(f"cannot write {args.out}: {exc.strerror or exc}") from None
    print(f"wrote the review summary to {done.summary} and {done.documents:,} document pages in {done.folder}/ "
          f"({done.pages_written:,} written, {done.pages_kept:,} unchanged, {done.pages_removed:,} removed)",
          file=sys.stderr)
    return 0


# ----------------------------------------------------------------------------- deliver

def cmd_deliver(args: argparse.Namespace) -> int:
    from dataclasses import asdict

    from thresher.flows.deliver import DeliveryError, deliver
    from thresher.flows.store import StoreLocked, new_run_id

    definition = _definition(args)
    store = _open_store(args, definition)
    if not definition.model.deliver.targets:
        raise UsageError("the flow definition names no targets (deliver.targets); see the README's Delivery section")
    # The lock keeps a run from committing while its predecessor is delivered.
    holder = f"deliver-{new_run_id()}"
    try:
        store.acquire_lock(holder, wait_seconds=60)
    except StoreLocked as exc:
        raise UsageError(str(exc)) from None
    try:
        results = deliver(definition, store, args.target)
    except DeliveryError as exc:
        raise UsageError(str(exc)) from None
    finally:
        store.release_lock(holder)
    if args.json:
        print(json.dumps([asdict(r) for r in results], indent=2))
        return 0
    for r in results:
        if r.mode == "up to date":
            print(f"{r.target}: already up to date ({r.rows} chunks)")
        elif r.mode == "full load":
            print(f"{r.target}: full load of {r.upserts} chunks from the hand-off of run {r.runs[0]}")
        else:
            print(f"{r.target}: applied {len(r.runs)} run(s) in order ({', '.join(r.runs)}): "
                  f"{r.upserts} upserted, {r.deletes} deleted; now {r.rows} chunks")

# ----------------------------------------------------------------------------- housekeeping

def cmd_verify(args: argparse.Namespace) -> int:
    from thresher.flows.verify import PROBLEM, verify

    store = _open_store(args, _definition(args))
    findings = verify(store)
    problems = [f for f in findings if f.severity == PROBLEM]
    if args.json:
        print(json.dumps({"store": store.root, "intact": not problems, "runs": len(store.runs()),
                          "findings": [f.as_dict() for f in findings]}, indent=2))
    else:
        for f in findings:
            print(f.line())
        print(f"{len(problems)} problem(s), {len(findings) - len(problems)} note(s) in {store.root} "
              f"({len(store.runs())} committed runs)", file=sys.stderr)
    return 1 if problems else 0


@contextmanager
def _locked(store):
    from thresher.flows.store import StoreError, new_run_id

    holder = "housekeeping-" + new_run_id()
    try:
        store.acquire_lock(holder)
    except StoreError as exc:  # held by a run, or a store that cannot be written
        raise UsageError(str(exc)) from None
    try:
        store.recover()
        store.sweep_uncommitted()
        yield
    finally:
        store.release_lock(holder)


def cmd_compact(args: argparse.Namespace) -> int:
    from thresher.flows.housekeeping import compact

    store = _open_store(args, _definition(args))
    known = {s["name"] for s in store.latest_run().manifest["definition"]["steps"]}
    for name in args.stage or []:
        if name not in known:
            raise UsageError(f"no stage {name!r} in the store; stages are {', '.join(sorted(known))}")
    with _locked(store):
        done = compact(store, 0, args.stage)
    if args.json:
        print(json.dumps([vars(d) for d in done], indent=2))
    else:
        for d in done:
            print(f"{d.stage}: {d.parts_before} part files into {d.parts_after}, {d.rows_after} rows")
        if not done:
            print("nothing to compact: every stage is in one part file or none")
    return 0


def cmd_retain(args: argparse.Namespace) -> int:
    from thresher.flows.housekeeping import retain

    if args.keep_runs is None and args.since is None:
        raise UsageError("say what to keep: --keep-runs N and/or --since DATE")
    store = _open_store(args, _definition(args))
    if args.dry_run:
        plan = retain(store, args.keep_runs, args.since, args.keep_changes, dry_run=True)
    else:
        with _locked(store):
            plan = retain(store, args.keep_runs, args.since, args.keep_changes)
    if args.json:
        print(json.dumps(vars(plan), indent=2))
        return 0
    verb = "would remove" if args.dry_run else "removed"
    print(f"keeping {len(plan.kept_runs)} run(s) whole and the current view; {verb}:")
    for stage, n in plan.rows_dropped.items():
        if n:
            print(f"  {stage}: {n} old attempt row(s)")
    print(f"  {len(plan.changes)} change set(s), {len(plan.runs_removed)} old run(s) with nothing left")
    print(f"{'about ' if args.dry_run else ''}{plan.bytes_freed:,} bytes {'would be ' if args.dry_run else ''}freed")
    return 0


# ----------------------------------------------------------------------------- schedule

def cmd_schedule(args: argparse.Namespace) -> int:
    definition = _definition(args)
    source = args.source or definition.model.source.root
    if not Path(source).is_dir():
        raise UsageError(f"source folder not found: {source}")
    store_root = _store_root(args, definition)
    from thresher.flows import schedule

    _need_prefect_api()
    sched = definition.model.schedule
    api = os.environ.get("PREFECT_API_URL") or "the embedded Prefect server (set PREFECT_API_URL for your own)"
    print(f"thresher: serving deployment {schedule.deployment_name(definition)} on {api}; "
          f"cron '{sched.cron}' in {sched.timezone}; source {Path(source).resolve()}, "
          f"store {Path(store_root).resolve()}. Stop with Ctrl-C.", file=sys.stderr, flush=True)
    schedule.serve(definition, str(Path(source).resolve()), str(Path(store_root).resolve()), args.workers)
    return 0


# Commands that run a flow: pipeline.run turns the garbage collector back on once
# they have imported what a run needs (the others turn it on as they start).
FLOW_VERBS = ("run", "rerun")

COMMANDS = {"run": cmd_run, "status": cmd_status, "trail": cmd_trail, "failures": cmd_failures,
            "rerun": cmd_rerun, "report": cmd_report, "export": cmd_export, "deliver": cmd_deliver,
            "schedule": cmd_schedule,
            "verify": cmd_verify, "compact": cmd_compact, "retain": cmd_retain}


class _QuietDrain(logging.Filter):
    """Drops Prefect's "Still processing items: N items remaining..." notice. Its event
    worker prints it whenever the process exits with events still queued (a run's last
    state changes, nearly always), as a WARNING on the command's output; the events are
    sent all the same, so it warns of nothing."""

    def filter(self, record: logging.LogRecord) -> bool:
        return not str(record.msg).startswith("Still processing items")


_QUIET_DRAIN = _QuietDrain()


def main(argv: list[str] | None = None) -> int:
    # The event worker logs under its class name (prefect _internal/concurrency/services.py).
    logging.getLogger("EventsWorker").addFilter(_QUIET_DRAIN)  # once: same object
    parser = build_parser()
    if not (sys.argv[1:] if argv is None else argv):  # plain `thresher`: show what it can do
        parser.print_help()
        return 0
    args = parser.parse_args(argv)
    if args.verb not in FLOW_VERBS:
        collect_after_imports()
    try:
        return COMMANDS[args.verb](args)
    except UsageError as exc:
        print(f"thresher {args.verb}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print(f"thresher {args.verb}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # e.g. `thresher trail X | head`: the reader has what it wanted
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0


def console_main() -> None:
    """The `thresher` command: main(), then an exit without the interpreter's teardown.

    Freeing the ~2,000 modules Prefect, pydantic and pyarrow load takes 0.4-1 s after
    every command, longer than a run that changes nothing. By then the run is committed;
    what must still happen does here, in the interpreter's own order: Prefect's log and
    event workers drain (threading's exit hooks), then atexit handlers (worker processes
    stopped, logging flushed), then the standard streams.

    The cyclic collector is off while the command imports what it needs
    (runtime.collect_after_imports turns it on)."""
    import gc

    gc.disable()
    code = main()
    shutdown = getattr(threading, "_shutdown", None)  # what Py_FinalizeEx calls first
    # A profiler or coverage tracer writes its results at the ordinary exit.
    if shutdown is None or sys.getprofile() or sys.gettrace():
        sys.exit(code)
    shutdown()
    atexit._run_exitfuncs()
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (BrokenPipeError, ValueError):
            pass
    os._exit(code or 0)


if __name__ == "__main__":
    console_main()
