"""The ``lenslane`` command line."""
from __future__ import annotations

import argparse
import json
import os
import sqlite3
import sys
from pathlib import Path

from lenslane import __version__
from lenslane.vocabulary import CAUTION


def _host(lab: Path | None, trace: bool = False):
    from lenslane.config import load_config
    from lenslane.chain.host import start_host

    return start_host(load_config(lab), trace=trace or None)


def cmd_init(args) -> int:
    from lenslane.lab.folder import init_lab

    created = init_lab(Path(args.lab))
    print(f"lab folder {args.lab}: " + (("created " + ", ".join(created)) if created else "already set up, nothing changed"))
    return 0


def cmd_schema(args) -> int:
    from lenslane.contract.models import LensOrder, LensOrderResult

    model = LensOrderResult if args.result else LensOrder
    print(json.dumps(model.model_json_schema(), indent=2, ensure_ascii=False))
    return 0


def cmd_audit_verify(args) -> int:
    from lenslane.audit.checkpoint import check_checkpoints, load_public_key, read_checkpoints
    from lenslane.audit.index import level_index
    from lenslane.audit.verify import verify

    # The files the command line names are read first: one that cannot be read is a mistake in the command.
    try:
        checkpoints = read_checkpoints(Path(args.checkpoints)) if args.checkpoints else None
        key = load_public_key(Path(args.public_key)) if args.public_key else None
    except OSError as exc:
        print(f"lenslane: cannot read {exc.filename}: {exc.strerror}", file=sys.stderr)
        return 2
    except ValueError as exc:  # the key file is there but holds no Ed25519 public key
        print(f"lenslane: {exc}", file=sys.stderr)
        return 2
    lab = Path(args.lab)
    with level_index(lab) as index:
        report = verify(lab, full=args.full, index=index)
        print(report.summary())
        for note in report.notes:
            print(f"note: {note}")
        for finding in (report.breaks + report.result_problems)[1:]:
            print(f"also: {finding}")
        ok = report.ok
        if checkpoints is not None:
            findings = check_checkpoints(index, checkpoints, key)
            if not checkpoints:
                print(f"checkpoints BROKEN: {args.checkpoints} holds no checkpoint line")
                ok = False
            elif findings:
                print(f"checkpoints BROKEN at {findings[0]}")
                for finding in findings[1:]:
                    print(f"also: {finding}")
                ok = False
            else:
                signed = " (signatures verified)" if key is not None else ""
                print(f"checkpoints hold: {len(checkpoints)} checkpoint(s) in {args.checkpoints}, the last at seq "
                      f"{max(c.fields['seq'] for c in checkpoints)}{signed}")
        return 0 if ok else 1


def cmd_audit_reindex(args) -> int:
    from lenslane.audit.index import Index

    index = Index(Path(args.lab))
    try:
        count = index.rebuild()
        print(f"audit index rebuilt from the log: {count} records indexed in {index.path}")
    finally:
        index.close()
    return 0


def cmd_audit_checkpoint(args) -> int:
    from lenslane.audit.checkpoint import checkpoint_line, load_private_key, load_signing_key, make_checkpoint
    from lenslane.audit.index import Index
    from lenslane.config import load_config

    lab = Path(args.lab)
    key = load_private_key(Path(args.key)) if args.key else load_signing_key(lab, load_config(lab).audit.signing_key)
    index = Index(lab)
    try:
        index.catch_up()
        print(checkpoint_line(make_checkpoint(index, key)))
    finally:
        index.close()
    return 0


def cmd_audit_keygen(args) -> int:
    from lenslane.audit.checkpoint import make_key_pair

    try:
        public = make_key_pair(Path(args.key))
    except FileExistsError:
        print(f"lenslane: {args.key} already exists; it is never overwritten", file=sys.stderr)
        return 1
    print(f"private key {args.key} (keep it with the lab, readable by the engine only); public key {public} "
          "(give it to whoever verifies)")
    return 0


def cmd_explain(args) -> int:
    from lenslane.report import configurations, order_story, render_configurations, render_text

    if args.html and (args.json or args.config):
        print("lenslane: --html writes the order page, which has neither --json nor --config", file=sys.stderr)
        return 2
    story = order_story(Path(args.lab), args.order_id)
    if args.html and story["found"]:
        from lenslane.web.page import render_order_page

        Path(args.html).write_text(render_order_page(Path(args.lab), args.order_id), encoding="utf-8")
        print(f"lenslane: wrote the story of {args.order_id} to {args.html}")
    elif args.json:
        if args.config and story["found"]:
            story["configurations"] = configurations(Path(args.lab), story)
        print(json.dumps(story, indent=1, ensure_ascii=False))
    elif story["found"]:
        print(render_text(story))
        if args.config:
            print()
            print(render_configurations(configurations(Path(args.lab), story)))
            print(f"\n{CAUTION}")  # the text ends with the caution, the configuration too
    else:
        print(f"lenslane: {render_text(story)}\n{CAUTION}", file=sys.stderr)
    return 0 if story["found"] else 1


def cmd_serve(args) -> int:
    from lenslane.web.serve import ServeRefused, serve

    try:
        return serve(Path(args.lab), args.host, args.port)
    except ServeRefused as exc:
        print(f"lenslane: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:
        print(f"lenslane: cannot serve on {args.host}:{args.port}: {exc}", file=sys.stderr)
        return 2


def cmd_preview(args) -> int:
    from lenslane.contract.intake import OrderRejected, read_order
    from lenslane.chain.pipeline import Pipeline, StageFailure

    host = _host(Path(args.lab) if args.lab else None, args.trace_hooks)
    raw = Path(args.file).read_bytes()
    try:
        order, parsed = read_order(raw, host.settings.materials)
        # Writes nothing and tells nobody: no hook with side effects (lenslane_result_ready) runs.
        result = Pipeline(host, side_effects=False).run(order, parsed).result
    except OrderRejected as exc:
        problems = exc.problems
    except StageFailure as exc:
        problems = [{"field": exc.field, "message": exc.message}]
    else:
        print(json.dumps(result, indent=1, ensure_ascii=False))
        return 0
    print(json.dumps({"file": args.file, "rejected": True, "problems": problems}, indent=1, ensure_ascii=False))
    return 1


def cmd_plugins(args) -> int:
    host = _host(Path(args.lab) if args.lab else None)
    chain = [link.stage.name for link in host.chain]
    rows = [("stage", "position", "enabled", "from", "version", "plugin", "what it does")]
    for name, info in host.stages.items():
        if name in chain:
            position, enabled = str(chain.index(name) + 1), "yes"
        elif name in host.disabled:
            position, enabled = str(host.config.engine.chain.index(name) + 1), "no (disabled)"
        else:
            position, enabled = "-", "no (not in engine.chain)"
        rows.append((name, position, enabled, info.origin, info.version, info.plugin.name, info.stage.description))
    rows[1:] = sorted(rows[1:], key=lambda r: (r[1] == "-", int(r[1]) if r[1] != "-" else 0, r[0]))
    _print_table(rows)
    with_stages = {info.plugin.name for info in host.stages.values()}
    hook_only = [info for name, info in host.plugins.items() if name not in with_stages]
    if hook_only:
        print()
        print("plugins without stages (hooks only):")
        _print_table([("plugin", "from", "version", "hooks")] + [
            (info.name, "built-in" if info.builtin else info.distribution, info.version, ", ".join(info.hooks))
            for info in hook_only])
    if host.config.engine.blocked:
        print("blocked (not loaded): " + ", ".join(host.config.engine.blocked))
    return 0


def _print_table(rows: list[tuple[str, ...]]) -> None:
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    for row in rows:
        print("  ".join(cell.ljust(width) for cell, width in zip(row, widths)).rstrip())


def cmd_watch(args) -> int:
    from lenslane.watch.daemon import run

    return run(Path(args.lab), _host(Path(args.lab), args.trace_hooks), once=args.once, stats=args.stats)


def cmd_status(args) -> int:
    from lenslane.lab.status import lab_status, render

    status = lab_status(Path(args.lab))
    print(json.dumps(status, indent=1, ensure_ascii=False) if args.json else render(status))
    return 0


def cmd_queue(args) -> int:
    from lenslane.decide import queue
    from lenslane.decide.listing import render

    items = queue(Path(args.lab))
    if args.json:
        print(json.dumps({"waiting": [item.to_dict() for item in items], "caution": CAUTION}, indent=1,
                         ensure_ascii=False))
    else:
        print(render(items))
        print(f"\n{CAUTION}")
    return 0


def cmd_decide(args) -> int:
    from lenslane.decide import DecisionError, decide

    try:
        done = decide(Path(args.lab), args.order_id, args.action, args.by, args.note, held_file=args.held,
                      wait_seconds=args.wait)
    except DecisionError as exc:
        print(f"lenslane: {args.order_id}: {exc.message}", file=sys.stderr)
        return exc.exit_code
    if args.json:
        print(json.dumps(done.to_dict(), indent=1, ensure_ascii=False))
    else:
        print(f"{done.order_id}: {done.message} — decided by {done.by} at {done.decided_at}, audit seq {done.seq}")
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="lenslane",
        description="Unattended checks, compensation and audit trail for spectacle-lens orders.",
        epilog=CAUTION,
    )
    parser.add_argument("--version", action="version", version=f"lenslane {__version__}")
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    sub = commands.add_parser("init", help="make a lab folder (idempotent)", description="Make LAB/inbox, outbox, "
                              "review, held, rejected, archive, work, decisions, an empty audit.jsonl with its index "
                              "(audit.sqlite) and a commented lenslane.toml. Never overwrites an existing config.")
    sub.add_argument("lab", metavar="LAB")
    sub.set_defaults(func=cmd_init)

    sub = commands.add_parser("watch", help="process the lab's inbox", description="Watch LAB/inbox and process "
                              "every order: results to outbox/ (or review/ when a person must decide), bad orders to "
                              "rejected/, other versions of a published order to held/, inputs to archive/.")
    sub.add_argument("lab", metavar="LAB")
    sub.add_argument("--once", action="store_true", help="drain the inbox once and exit")
    sub.add_argument("--stats", action="store_true",
                     help="with --once: also print the time spent in each stage, as one JSON line")
    sub.add_argument("--trace-hooks", action="store_true", help="print every hook call to standard error")
    sub.set_defaults(func=cmd_watch)

    sub = commands.add_parser("status", help="the lab at a glance: engine, folders, entries not taken, audit log",
                              description="Whether an engine runs on LAB (pid, since when), how many entries each "
                              "folder holds, the oldest waiting order's age, the entries the engine could not take "
                              "and why, and the audit log's last record and size. Reads only.")
    sub.add_argument("lab", metavar="LAB")
    sub.add_argument("--json", action="store_true", help="the same as JSON, for monitoring")
    sub.set_defaults(func=cmd_status)

    sub = commands.add_parser("preview", help="print the result of one order file, writing nothing",
                              description="Run one order file through the chain and print the result JSON.")
    sub.add_argument("file", metavar="FILE")
    sub.add_argument("--lab", metavar="LAB", help="use this lab's config (default: the built-in defaults)")
    sub.add_argument("--trace-hooks", action="store_true", help="print every hook call to standard error")
    sub.set_defaults(func=cmd_preview)

    sub = commands.add_parser("plugins", help="list the stages and where they come from",
                              description="List every stage: its place in the chain, whether it is enabled, "
                              "the distribution that provides it and its version; then the plugins that "
                              "take part through hooks only.")
    sub.add_argument("--lab", metavar="LAB", help="use this lab's config (default: the built-in defaults)")
    sub.set_defaults(func=cmd_plugins)

    sub = commands.add_parser("audit", help="check, index and pin the lab's audit log",
                              description="Work with LAB/audit.jsonl and its index LAB/audit.sqlite.")
    audit_commands = sub.add_subparsers(dest="audit_command", required=True, metavar="ACTION")
    sub = audit_commands.add_parser("verify", help="check the hash chain and the outbox against it",
                                    description="Check the hash chain (from the last point found intact, or all of "
                                    "it with --full), the define records, and that each published result in outbox/ "
                                    "still has the sha256 the log recorded. Exit 0 with a one-line summary when "
                                    "intact; exit 1 naming the first broken record or checkpoint.")
    sub.add_argument("lab", metavar="LAB")
    sub.add_argument("--full", action="store_true", help="walk every record from seq 1")
    sub.add_argument("--checkpoints", metavar="FILE",
                     help="also check the log against every checkpoint line in FILE (printed by `audit checkpoint`, "
                          "or the engine's own log)")
    sub.add_argument("--public-key", metavar="FILE", help="with --checkpoints: every checkpoint must be signed by the "
                     "private key of this Ed25519 public key")
    sub.set_defaults(func=cmd_audit_verify)
    sub = audit_commands.add_parser("reindex", help="rebuild the audit index from the log",
                                    description="Rebuild LAB/audit.sqlite from the audit log alone.")
    sub.add_argument("lab", metavar="LAB")
    sub.set_defaults(func=cmd_audit_reindex)
    sub = audit_commands.add_parser("checkpoint", help="print one checkpoint line to keep elsewhere",
                                    description="Print the log's last seq, its hash, the time and the counts as one "
                                    "line (signed when [audit] signing_key or --key names a private key).")
    sub.add_argument("lab", metavar="LAB")
    sub.add_argument("--key", metavar="FILE", help="sign with this Ed25519 private key (PEM)")
    sub.set_defaults(func=cmd_audit_checkpoint)
    sub = audit_commands.add_parser("keygen", help="make an Ed25519 key pair for signing checkpoints",
                                    description="Write a new Ed25519 private key to KEY (mode 0600) and its public "
                                    "key to KEY.pub. Never overwrites.")
    sub.add_argument("key", metavar="KEY")
    sub.set_defaults(func=cmd_audit_keygen)

    sub = commands.add_parser("explain", help="tell the story of one order from the audit log",
                              description="What arrived and from whom, what each stage changed and why, every flag, "
                              "the final lens and the outcome of one order, read from the audit log (the outbox may "
                              "be gone). ORDER is an order id or an input file name. Exit 1 when the log does not "
                              "know it.")
    sub.add_argument("lab", metavar="LAB")
    sub.add_argument("order_id", metavar="ORDER")
    sub.add_argument("--json", action="store_true", help="the same story as JSON data")
    sub.add_argument("--config", action="store_true", help="also show the configuration in force")
    sub.add_argument("--html", metavar="FILE", help="write the story as one self-contained web page (styles and "
                     "pictures of the lens inline, no external link) to FILE")
    sub.set_defaults(func=cmd_explain)

    from lenslane.web.serve import DEFAULT_HOST, DEFAULT_PORT, TOKEN_VARIABLE

    sub = commands.add_parser("serve", help="serve the lab's web page: the queue, each order, decisions by click",
                              description="Serve the lab's web page: the orders awaiting a person, each order's "
                              "story with pictures of the lens, a search, and the decision form. Loopback only by "
                              f"default; any other address needs an access token in {TOKEN_VARIABLE} (at least 16 "
                              "characters) and refuses to start without one. The server holds no lock and writes "
                              "only through the decision mechanism.")
    sub.add_argument("lab", metavar="LAB")
    sub.add_argument("--host", default=DEFAULT_HOST, help=f"address to listen on (default {DEFAULT_HOST})")
    sub.add_argument("--port", type=int, default=DEFAULT_PORT, help=f"port (default {DEFAULT_PORT}; 0: any free port)")
    sub.set_defaults(func=cmd_serve)
    sub = commands.add_parser("queue", help="list what waits for a person, oldest first",
                              description="Orders in review/ with their flags, and held orders (another version of "
                              "a published order) with what differs, field by field; each with its age.")
    sub.add_argument("lab", metavar="LAB")
    sub.add_argument("--json", action="store_true", help="the same list as JSON data")
    sub.set_defaults(func=cmd_queue)

    sub = commands.add_parser(
        "decide", help="approve or refuse a result in review; replace or discard a held order",
        description="Record a person's decision on an order, exactly once, in the audit chain. approve: the "
        "result in review/ goes to outbox/ with status ready and an approved block; refuse: it goes to "
        "rejected/ with your reason. replace: the held version is run through the chain as the order's next "
        "revision and supersedes the published result (kept in archive/); discard: the held version is archived. "
        "Works whether or not `lenslane watch` runs on the lab. Exit codes: 0 decided; 1 the lab could not be "
        "written (the request stays and is applied later); 2 a request not well "
        "formed; 4 unknown order; 5 not awaiting this decision (decided already, or waiting for another kind); "
        "6 the file does not match the audit log; 7 the running engine did not take the request in time.")
    sub.add_argument("lab", metavar="LAB")
    sub.add_argument("order_id", metavar="ORDER_ID")
    sub.add_argument("action", choices=["approve", "refuse", "replace", "discard"])
    sub.add_argument("--by", required=True, metavar="NAME", help="who decides (required)")
    sub.add_argument("--note", required=True, metavar="TEXT", help="why (required; a refusal's reason)")
    sub.add_argument("--held", metavar="NAME", help="which held version (a name in held/), when there are several")
    sub.add_argument("--wait", type=float, default=30.0, metavar="SECONDS",
                     help="how long to wait for a running engine to take the decision (default 30)")
    sub.add_argument("--json", action="store_true", help="print the decision as JSON data")
    sub.set_defaults(func=cmd_decide)

    sub = commands.add_parser("schema", help="print the JSON Schema of the order (or of the result)",
                              description="Print the JSON Schema of lens-order/1, or of lens-order-result/1.")
    sub.add_argument("--result", action="store_true", help="the schema of the result instead")
    sub.set_defaults(func=cmd_schema)
    return parser


def main(argv: list[str] | None = None) -> int:
    from lenslane.chain.host import PluginError
    from lenslane.config import ConfigError

    from lenslane.audit.index import Undefined
    from lenslane.lab.files import NotALabFolder, require_lab

    args = build_parser().parse_args(argv)
    try:
        if getattr(args, "lab", None) and args.func is not cmd_init:
            require_lab(Path(args.lab))
        code = args.func(args)
        sys.stdout.flush()  # a reader that stopped reading (`| head`) is met here, not at the interpreter's exit
        return code
    except BrokenPipeError:
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())  # what is still buffered goes nowhere
        return 1
    except PluginError as exc:
        print(f"lenslane: bad plugin: {exc}", file=sys.stderr)
        return 2
    except ConfigError as exc:
        print(f"lenslane: bad config: {exc}", file=sys.stderr)
        return 2
    except NotALabFolder as exc:
        print(f"lenslane: {exc}", file=sys.stderr)
        return 2
    except Undefined as exc:  # a story told from a log whose define records were removed
        print(f"lenslane: {exc}", file=sys.stderr)
        return 1
    except sqlite3.OperationalError as exc:  # the audit index on a full disk, say: said, not a traceback
        print(f"lenslane: the lab's audit index (audit.sqlite) cannot be used: {exc}", file=sys.stderr)
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
