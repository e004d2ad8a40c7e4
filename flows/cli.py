"""The ``fitaudit`` command line.

Commands: ``demo``, ``run``, ``refit``, ``backfill``, ``serve``, ``verify``, ``registry check``,
``registry schema``, ``promote``, ``params import``, ``signoff`` and ``acknowledge``;
``fitaudit COMMAND --help`` describes each.

A failure prints one line naming what failed (for a file system error: the path, the cause and what
to do) and exits 1.  SIGTERM (what ``timeout`` and service managers send) stops the command cleanly:
the batches' worker processes and the Prefect server it started are stopped, and the next run's
recovery settles the interrupted run.  After SIGKILL nothing can be stopped; the next ``fitaudit``
command stops the server the killed one left running (``fitaudit.flows.server.reap_stale_servers``).

Exit codes: 0 success (an audit whose models fail still succeeds, unless ``--fail-on`` names
their verdicts); 1 unexpected failure; 2 invalid usage or an invalid registry; 3 a verdict named
by ``--fail-on`` occurred; 4 ``verify`` found a problem.
"""

from __future__ import annotations

import argparse
import contextlib
import datetime as dt
import errno
import json
import os
import pathlib
import re
import signal
import sys
import threading
from collections.abc import Sequence

from fitaudit.core.vocabulary import VERDICTS

from . import _env

__all__ = ["main", "build_parser"]

EXIT_OK, EXIT_ERROR, EXIT_USAGE, EXIT_FAIL_ON, EXIT_VERIFY = 0, 1, 2, 3, 4


def _date(text: str) -> dt.date:
    try:
        return dt.date.fromisoformat(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a date like 2026-11-30, got {text!r}") from None


def _verdicts(text: str) -> tuple[str, ...]:
    items = tuple(v.strip() for v in text.split(",") if v.strip())
    bad = [v for v in items if v not in VERDICTS]
    if bad:
        raise argparse.ArgumentTypeError(f"unknown verdict(s) {', '.join(bad)}; choose from {', '.join(VERDICTS)}")
    return items


def build_parser() -> argparse.ArgumentParser:
    """The argument parser (exposed for tests and documentation)."""
    p = argparse.ArgumentParser(
        prog="fitaudit",
        description="Weekly goodness-of-fit audits of registered forecasting models, on Prefect 3.",
        epilog=(
            "Exit codes: 0 ok; 1 failure; 2 usage or registry invalid; 3 --fail-on verdict seen; 4 verify found "
            "problems."
        ),
    )
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    d = sub.add_parser("demo", help="write the demo extract, registry and archive, audit them, print the report path")
    d.add_argument("--out", default="fitaudit-demo", help="folder for the demo (default ./fitaudit-demo)")
    d.add_argument("--fresh", action="store_true", help="delete the demo folder first")
    d.add_argument(
        "--weeks",
        type=int,
        default=3,
        help="weekly audits to run on the first demo (default 3: two earlier weeks build a history)",
    )

    def run_options(sp: argparse.ArgumentParser) -> None:
        sp.add_argument(
            "registry", nargs="?", help="registry YAML file (default: the registry_path setting, ./registry.yaml)"
        )
        sp.add_argument("--archive", help="archive folder (default: the archive_root setting, ./archive)")
        sp.add_argument("--as-of", type=_date, help="as-of date YYYY-MM-DD (default: today, UTC)")
        sp.add_argument("--batch-size", type=int, default=0, help="models per Prefect task (default: automatic)")
        sp.add_argument(
            "--dask",
            metavar="ADDRESS",
            help="run batches on Dask: a scheduler address, or local:N for a local cluster of N processes",
        )
        sp.add_argument(
            "--start-server",
            action="store_true",
            help="start a local Prefect server for this command (needed by --dask when PREFECT_API_URL is unset)",
        )
        sp.add_argument("--quiet", action="store_true", help="print only the report path")

    r = sub.add_parser("run", help="audit every model of a registry once")
    run_options(r)
    r.add_argument("--models", nargs="+", metavar="ID", help="audit only these model ids")
    r.add_argument("--refit", action="store_true", help="start the refit flow right away for refit/respecify verdicts")
    r.add_argument(
        "--fail-on",
        type=_verdicts,
        default=(),
        metavar="VERDICTS",
        help="exit 3 if any model gets one of these verdicts (comma-separated)",
    )

    f = sub.add_parser("refit", help="refit models, store parameter versions, promote or list candidates")
    run_options(f)
    f.add_argument(
        "--model", dest="models", action="append", required=True, metavar="ID", help="model id (repeat for several)"
    )
    f.add_argument("--approve", action="store_true", help="promote passing refits now (records --by as approver)")
    f.add_argument("--by", default="", help="approver's name and role, recorded with the promotion")
    f.add_argument(
        "--registry-sha256",
        metavar="DIGEST",
        help=(
            "refuse the registry unless its SHA-256 is DIGEST (the audit run's manifest records it): refit what was "
            "audited"
        ),
    )

    b = sub.add_parser("backfill", help="audit a range of past as-of dates so that trends exist from day one")
    run_options(b)
    b.add_argument("--start", type=_date, required=True, help="first as-of date")
    b.add_argument("--end", type=_date, required=True, help="last as-of date")
    b.add_argument("--every", type=int, default=7, help="days between as-of dates (default 7)")

    s = sub.add_parser("serve", help="serve the audit (weekly cron) and refit (event-triggered) deployments")
    s.add_argument(
        "registry", nargs="?", help="registry YAML file (default: the registry_path setting, ./registry.yaml)"
    )
    s.add_argument("--archive", help="archive folder")
    s.add_argument("--cron", default="0 6 * * 1", help="cron schedule of the audit (default Mondays 06:00)")
    s.add_argument("--timezone", default="UTC", help="time zone of the schedule")
    s.add_argument(
        "--start-server", action="store_true", help="start a local Prefect server if PREFECT_API_URL is unset"
    )

    v = sub.add_parser("verify", help="check every archived file and the hash chain; exit 4 on any problem")
    v.add_argument("archive", help="archive folder")
    v.add_argument(
        "--head",
        type=_head,
        metavar="HEAD",
        help="a chain head recorded outside the archive, as verify and run print it "
        "('head: <sha256> (seq N)', quoted, or the bare SHA-256), to detect a truncated or rewritten chain",
    )
    v.add_argument("--notes", action="store_true", help="also list notes (pending publications, leftovers)")
    v.add_argument("--json", action="store_true", help="print problems as JSON")

    g = sub.add_parser("registry", help="registry commands")
    gsub = g.add_subparsers(dest="registry_command", metavar="SUBCOMMAND")
    gsub.required = True
    gc = gsub.add_parser("check", help="validate a registry and print every problem with file:line")
    gc.add_argument(
        "registry", nargs="?", help="registry YAML file (default: the registry_path setting, ./registry.yaml)"
    )
    gc.add_argument(
        "--deep",
        action="store_true",
        help="also open every source (files, columns, filter, a sample of series against the calendar) and import "
        "every user mean function",
    )
    gc.add_argument(
        "--as-of", type=_date, default=None, help="with --deep: the date dated uris are resolved for (default: today)"
    )
    gsub.add_parser(
        "schema",
        help="print the registry's JSON Schema, for editors (completion and checks while typing)",
        description="Print the JSON Schema (draft 2020-12) of a registry file. Save it, e.g. as registry.schema.json, "
        "and point your editor at it; with the YAML language server a first line "
        "'# yaml-language-server: $schema=registry.schema.json' in the registry does it. "
        "`fitaudit registry check` remains the full check (sources declared, spec buildable, ids unique).",
    )

    pr = sub.add_parser("promote", help="promote a candidate parameter version (writes a new version; never edits one)")
    pr.add_argument("archive", help="archive folder")
    pr.add_argument("model", help="model id")
    pr.add_argument("version", type=int, help="candidate version to promote")
    pr.add_argument("--by", required=True, help="approver's name and role")
    pr.add_argument("--note", required=True, help="why it is approved")

    pm = sub.add_parser("params", help="parameter commands")
    pmsub = pm.add_subparsers(dest="params_command", metavar="SUBCOMMAND")
    pmsub.required = True
    pi = pmsub.add_parser(
        "import",
        help="store parameters estimated elsewhere as a model's production version (checked, then promoted)",
        description="Check a parameters file (JSON, or YAML for .yaml/.yml: params, noise, date, approved_by; see the "
        "README) against the registry's model entry and store it as the model's production version.",
    )
    pi.add_argument("registry", help="registry YAML file (read only)")
    pi.add_argument("model", help="model id")
    pi.add_argument("file", help="parameters file")
    pi.add_argument("--by", required=True, help="who imports the parameters (name and role)")
    pi.add_argument("--archive", help="archive folder (default: the archive_root setting, ./archive)")

    ak = sub.add_parser(
        "acknowledge",
        help="record the archive's damage in the hash chain so that runs can continue (when it cannot be restored)",
        description="Record every problem `fitaudit verify` finds in an 'acknowledgement' chain entry, with who and "
        "why. Nothing is deleted or rewritten: a run folder or promoted version whose chain entry was lost is recorded "
        "as found, a chain line cut short is ended, and verify reports the recorded problems as acknowledged (any new "
        "damage is a problem again). Restore from a backup instead whenever you can.",
    )
    ak.add_argument("archive", help="archive folder")
    ak.add_argument("--by", required=True, help="who acknowledges the damage (name and role)")
    ak.add_argument(
        "--note", required=True, help="what happened (the incident) and why the originals cannot be restored"
    )

    so = sub.add_parser("signoff", help="record a reviewer's sign-off of an archived run in the hash chain")
    so.add_argument("archive", help="archive folder")
    so.add_argument("run_id", help="run id")
    so.add_argument("--name", required=True)
    so.add_argument("--role", required=True)
    so.add_argument("--note", default="")
    return p


@contextlib.contextmanager
def _server_if_needed(args: argparse.Namespace, flow_module: str, audited: int = 0):
    """Start a local Prefect server when asked, or when Dask is requested without one; otherwise the
    embedded server, while ``flow_module`` (the command's flows) is imported and, for a command
    that audits ``audited`` models, the worker processes its runs will use are started
    (:func:`fitaudit.flows.audit.start_workers_early`)."""
    wants = getattr(args, "start_server", False) or (
        getattr(args, "dask", None) and "PREFECT_API_URL" not in os.environ
    )
    if wants and "PREFECT_API_URL" not in os.environ:
        if getattr(args, "dask", None) and not args.start_server:
            raise SystemExit(
                "fitaudit: --dask needs a Prefect server (Dask workers cannot share the embedded one). "
                "Set PREFECT_API_URL to a running server (`prefect server start`) or add --start-server."
            )
        from .server import local_server

        log = pathlib.Path(os.environ["PREFECT_HOME"]) / "server.log"
        log.parent.mkdir(parents=True, exist_ok=True)
        with local_server(log_path=str(log)) as url:
            print(f"fitaudit: started a local Prefect server at {url} (log {log})", file=sys.stderr)
            yield url
    else:
        from .server import command_imports, embedded_server

        if os.environ.get("PREFECT_API_URL"):  # a server of the user's
            yield os.environ["PREFECT_API_URL"]
            return

        def prepare() -> None:
            command_imports(flow_module)
            if audited:
                from .audit import start_workers_early

                start_workers_early(audited)

        # started now rather than by the first flow, so that it is recorded and can be reaped after a SIGKILL
        with embedded_server(prepare) as url:
            yield url


def _with_runner(flow_fn, dask: str | None):
    if not dask:
        return flow_fn
    from .runners import dask_runner

    return flow_fn.with_options(task_runner=dask_runner(dask))


def _print_summary(result: dict, quiet: bool) -> None:
    if quiet:
        print(result["report"])
        return
    c = result["counts"]
    print(f"audit {result['run_id']} as of {result['as_of']}: {c['registered']} registered, {c['audited']} audited")
    print("  " + ", ".join(f"{v} {c[v]}" for v in VERDICTS))
    t = result.get("timings", {})
    if t:
        print(f"  {t.get('total_s', 0):.1f} s in the flow; {t.get('core_s', 0):.1f} s in the audit computations")
    print(f"report: {result['report']}")
    refits = result.get("refits")
    if refits:
        statuses = ", ".join(f"{r['model_id']} {r['status']}" for r in refits.get("records") or [])
        print(
            f"refit run {refits['run_id']} for {len(refits.get('records') or [])} flagged model(s): {statuses}; record "
            f"{refits['path']}"
        )


def _cmd_registry(args) -> int:
    return {"check": _cmd_registry_check, "schema": _cmd_registry_schema}[args.registry_command](args)


def _cmd_registry_schema(args) -> int:
    from fitaudit.tasks.registry import registry_json_schema

    print(json.dumps(registry_json_schema(), indent=2))
    return EXIT_OK


def _cmd_registry_check(args) -> int:
    from fitaudit.tasks.registry import check_registry

    if args.deep:
        from fitaudit.tasks.deepcheck import deep_check

        problems = deep_check(args.registry, as_of=args.as_of)
    else:
        problems = check_registry(args.registry)
    if not problems:
        print(f"{args.registry}: valid" + (" (sources opened, mean functions imported)" if args.deep else ""))
        return EXIT_OK
    for p in problems:
        print(str(p))
    print(f"{len(problems)} problem(s)", file=sys.stderr)
    return EXIT_USAGE


def _head(text: str) -> str:
    from fitaudit.tasks.archive import parse_head

    try:
        parse_head(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None
    return text


def _print_head(archive: str) -> None:
    from fitaudit.tasks.archive import chain_head

    head = chain_head(archive)
    if head is not None:
        print(f"head: {head[0]} (seq {head[1]})")


def _cmd_verify(args) -> int:
    from fitaudit.tasks.archive import verify_archive

    problems = verify_archive(args.archive, include_notes=True, expected_head=args.head)
    real = [p for p in problems if not p.is_note]
    acknowledged = [p for p in problems if p.kind == "acknowledged"]
    shown = problems if args.notes else real + acknowledged
    if args.json:
        print(json.dumps([p.to_dict() for p in shown], indent=2))
        return EXIT_VERIFY if real else EXIT_OK
    for p in shown:
        print(("note: " if p.is_note else "problem: ") + str(p))
    state = f"{len(real)} problem(s)" if real else "intact"
    if acknowledged:
        state += f" ({len(acknowledged)} acknowledged problem(s), recorded in the chain)"
    print(f"{args.archive}: {state}")
    _print_head(args.archive)
    return EXIT_VERIFY if real else EXIT_OK


def _cmd_acknowledge(args) -> int:
    from fitaudit.tasks.archive import acknowledge_damage

    entry = acknowledge_damage(args.archive, by=args.by, note=args.note)
    payload = entry["payload"]
    for item in payload["problems"]:
        print(f"acknowledged: {item['where']}: {item['message']}")
    for item in payload["runs"]:
        print(f"recorded as found: run folder {item['path']} (its chain entry was lost)")
    for item in payload["promotions"]:
        print(f"recorded as found: promoted version {item['path']} (it had no promotion entry)")
    if payload.get("terminated_line"):
        print(f"ended chain line {payload['terminated_line']['line']}, which was cut short")
    for item in payload.get("journals_removed", []):
        print(f"moved into the chain entry and removed: {item['path']}")
    print(f"acknowledgement recorded as chain entry {entry['seq']} by {args.by}")
    print(f"head: {entry['hash']} (seq {entry['seq']})")
    return EXIT_OK


def _checked_registry(args):
    """The registry, validated before any flow (or server) starts; None after printing its problems.

    A registry-level problem prints the clean ``file:line`` message and the command exits 2: no
    flow run is started, so nothing is retried and Prefect prints no traceback.
    """
    from fitaudit.tasks.registry import RegistryError, load_registry

    try:
        return load_registry(args.registry)
    except RegistryError as exc:
        print(str(exc), file=sys.stderr)
        return None


def _timeout(flow_fn, registry, scale: int = 1):
    """The flow with the policy's timeout (``flow_timeout_minutes``, times ``scale`` runs)."""
    return flow_fn.with_options(timeout_seconds=60.0 * registry.policy.flow_timeout_minutes * max(scale, 1))


def _cmd_run(args) -> int:
    from fitaudit.tasks.registry import RegistryError

    reg = _checked_registry(args)
    if reg is None:
        return EXIT_USAGE
    with _server_if_needed(args, "fitaudit.flows.audit", len(set(args.models)) if args.models else len(reg.models)):
        from .audit import audit_flow

        flow_fn = _with_runner(_timeout(audit_flow, reg), args.dask)
        try:
            result = flow_fn(
                registry=args.registry,
                as_of=args.as_of,
                archive=args.archive,
                models=args.models,
                batch_size=args.batch_size,
                trigger_refits=args.refit,
                progress=not args.quiet,
            )
        except RegistryError as exc:
            print(str(exc), file=sys.stderr)
            return EXIT_USAGE
    _print_summary(result, args.quiet)
    if not args.quiet:
        _print_head(result["archive"])
    if args.fail_on and any(result["counts"][v] for v in args.fail_on):
        return EXIT_FAIL_ON
    return EXIT_OK


def _cmd_refit(args) -> int:
    from fitaudit.tasks.registry import RegistryChangedError, RegistryError

    reg = _checked_registry(args)
    if reg is None:
        return EXIT_USAGE
    with _server_if_needed(args, "fitaudit.flows.refit"):
        from .refit import refit_flow

        try:
            result = _with_runner(_timeout(refit_flow, reg), args.dask)(
                registry=args.registry,
                model_ids=args.models,
                archive=args.archive,
                as_of=args.as_of,
                approve=args.approve,
                approved_by=args.by,
                registry_sha256=args.registry_sha256,
            )
        except (RegistryError, RegistryChangedError) as exc:
            print(str(exc), file=sys.stderr)
            return EXIT_USAGE
    for rec in result["records"]:
        extra = ""
        if rec.get("promoted_version"):
            extra = f" (version {rec['promoted_version']} in production)"
        elif rec.get("candidate_version"):
            extra = f" (candidate version {rec['candidate_version']}; promote with `fitaudit promote`)"
        elif rec.get("candidates") is not None:
            extra = f" ({len(rec['candidates'])} passing candidate(s))"
        print(f"{rec['model_id']}: {rec['status']}{extra}")
    print(f"refit record: {result['path']}")
    return EXIT_OK


def _cmd_backfill(args) -> int:
    reg = _checked_registry(args)
    if reg is None:
        return EXIT_USAGE
    dates = max(1, (args.end - args.start).days // max(args.every, 1) + 1)
    with _server_if_needed(args, "fitaudit.flows.backfill", len(reg.models)):
        from .backfill import backfill_flow

        results = _with_runner(_timeout(backfill_flow, reg, dates), args.dask)(
            registry=args.registry, start=args.start, end=args.end, every_days=args.every, archive=args.archive
        )
    for r in results:
        _print_summary(r, True)
    return EXIT_OK


def _cmd_serve(args) -> int:
    if "PREFECT_API_URL" not in os.environ and not args.start_server:
        print(
            "fitaudit serve: schedules and event-triggered refits need a long-lived Prefect server, and none is "
            "configured (PREFECT_API_URL is unset; the embedded server runs no scheduler).\n"
            "Start one with `prefect server start` and `export PREFECT_API_URL=http://127.0.0.1:4200/api`, "
            "or run `fitaudit serve ... --start-server`. A single audit works without a server: `fitaudit run`.",
            file=sys.stderr,
        )
        return EXIT_USAGE
    if _checked_registry(args) is None:
        return EXIT_USAGE
    with _server_if_needed(args, "fitaudit.flows.deploy"):
        from .deploy import serve_all

        serve_all(
            registry=str(pathlib.Path(args.registry).resolve()),
            archive=args.archive,
            cron=args.cron,
            timezone=args.timezone,
        )
    return EXIT_OK


def _cmd_promote(args) -> int:
    from fitaudit.tasks.archive import require_intact
    from fitaudit.tasks.params import promote

    require_intact(args.archive)
    version = promote(args.archive, args.model, args.version, approved_by=args.by, note=args.note)
    print(f"{args.model}: version {version.version} promotes version {args.version} into production")
    _print_head(args.archive)
    return EXIT_OK


def _cmd_params(args) -> int:
    from fitaudit.tasks.archive import require_intact
    from fitaudit.tasks.params import ParamsFileError, import_params
    from fitaudit.tasks.registry import RegistryError
    from fitaudit.tasks.settings import get_settings

    archive = args.archive or str(get_settings().archive_root)
    require_intact(archive)
    try:
        version = import_params(args.registry, args.model, args.file, by=args.by, archive_root=archive)
    except (ParamsFileError, RegistryError) as exc:
        print(f"fitaudit params import: {exc}", file=sys.stderr)
        return EXIT_USAGE
    print(
        f"{args.model}: parameters from {args.file} are in production as version {version.version} "
        f"(approved by {version.created_by}; {version.note}); archive {archive}"
    )
    return EXIT_OK


def _cmd_signoff(args) -> int:
    from fitaudit.tasks.archive import record_signoff

    entry = record_signoff(args.archive, args.run_id, name=args.name, role=args.role, note=args.note)
    print(f"sign-off recorded as chain entry {entry['seq']}")
    print(f"head: {entry['hash']} (seq {entry['seq']})")
    return EXIT_OK


def _cmd_demo(args) -> int:
    with _server_if_needed(args, "fitaudit.flows.demo"):
        from .demo import run_demo

        result = run_demo(
            args.out,
            fresh=args.fresh,
            weeks=args.weeks,
            progress=lambda line: print(f"fitaudit demo: {line}", file=sys.stderr, flush=True),
        )
    _print_summary(result, False)
    print(f"verify the archive with: fitaudit verify {result['archive']}")
    return EXIT_OK


COMMANDS = {
    "demo": _cmd_demo,
    "run": _cmd_run,
    "refit": _cmd_refit,
    "backfill": _cmd_backfill,
    "serve": _cmd_serve,
    "verify": _cmd_verify,
    "registry": _cmd_registry,
    "promote": _cmd_promote,
    "params": _cmd_params,
    "signoff": _cmd_signoff,
    "acknowledge": _cmd_acknowledge,
}


def _default_registry(args: argparse.Namespace) -> str | None:
    """Fill an omitted registry argument from the ``registry_path`` setting; a message when that file is missing."""
    if not hasattr(args, "registry") or args.registry is not None:
        return None
    # the environment variable is the setting's highest-priority source: read it without loading
    # Prefect's settings machinery (about a second of imports), which the other sources need
    env = os.environ.get("PREFECT_INTEGRATIONS_FITAUDIT_REGISTRY_PATH")
    if env:
        path = pathlib.Path(env)
    else:
        from fitaudit.tasks.settings import get_settings

        path = get_settings().registry_path
    if not path.is_file():
        return (
            f"fitaudit {args.command}: no registry given, and the registry_path setting names {str(path)!r}, "
            "which is not a file. Give the registry file as an argument, or set "
            "PREFECT_INTEGRATIONS_FITAUDIT_REGISTRY_PATH (or registry_path under [integrations.fitaudit] in "
            "prefect.toml)."
        )
    args.registry = str(path)
    return None


class Terminated(BaseException):
    """Raised in the main thread on SIGTERM, so that the command unwinds and exits cleanly.

    Unwinding stops the local worker processes (``tasks.workers.local_workers``) and a server
    started with ``--start-server``; the embedded server is stopped by an exit handler.
    A ``BaseException``, like ``KeyboardInterrupt``: no ``except Exception`` swallows it.
    """


_TERMINATING = threading.Event()


def _on_sigterm(signum, frame) -> None:
    signal.signal(signal.SIGTERM, signal.SIG_IGN)  # one clean shutdown; a second SIGTERM does not cut it short
    _TERMINATING.set()  # the batches stopped on the way out fail noisily in Prefect's log; the command says why
    raise Terminated()


_OS_HINTS = {
    errno.ENOSPC: "free space on that file system and run again; the next run settles the interrupted one",
    errno.EDQUOT: "free space (disk quota) and run again; the next run settles the interrupted one",
    errno.EROFS: "the file system is mounted read-only; give an archive on a writable file system",
    errno.EACCES: "this user may not write there; fix the permissions or run as the archive's owner",
    errno.EPERM: "this user may not write there; fix the permissions or run as the archive's owner",
}


def _os_error_line(exc: OSError) -> str:
    """One line for an operating-system error: the path, the cause and what to do."""
    where = exc.filename if exc.filename is not None else "(the operating system named no file)"
    also = f" -> {exc.filename2}" if exc.filename2 is not None else ""
    code = f" [{errno.errorcode[exc.errno]}]" if exc.errno in errno.errorcode else ""
    hint = _OS_HINTS.get(exc.errno)
    return f"{where}{also}: {exc.strerror or exc}{code}" + (f"; {hint}" if hint else "")


def _quiet_prefect_tracebacks() -> None:
    """Leave expected failures to the command's one-line message: Prefect would log their tracebacks first."""
    import logging

    from fitaudit.core.exceptions import FitauditError

    kinds = (OSError, FitauditError, Terminated)

    def names(cls: type) -> set[str]:
        return {cls.__name__}.union(*(names(sub) for sub in cls.__subclasses__()))

    def expected(record: logging.LogRecord) -> bool:
        if _TERMINATING.is_set():
            return record.levelno < logging.ERROR
        exc = record.exc_info[1] if record.exc_info else None
        if exc is not None:
            return not isinstance(exc, kinds)
        failed = (
            re.search(r"encountered an exception:? (\w+)", record.getMessage())
            if record.levelno >= logging.ERROR
            else None
        )
        return failed is None or failed.group(1) not in set().union(*(names(k) for k in kinds))

    for name in ("prefect.flow_runs", "prefect.task_runs", "prefect.flow_engine", "prefect.task_engine"):
        logger = logging.getLogger(name)
        if not any(getattr(f, "__name__", "") == "expected" for f in logger.filters):  # once per process
            logger.addFilter(expected)


#: Commands that run Prefect flows (only these write Prefect's logging configuration).
FLOW_COMMANDS = frozenset({"demo", "run", "refit", "backfill", "serve"})


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``fitaudit`` command."""
    args = build_parser().parse_args(argv)
    _env.configure_prefect(write_logging=args.command in FLOW_COMMANDS)
    from fitaudit.core.exceptions import FitauditError

    from .server import reap_stale_servers

    for line in reap_stale_servers():
        print(f"fitaudit: {line}", file=sys.stderr)
    missing = _default_registry(args)
    if missing:
        print(missing, file=sys.stderr)
        return EXIT_USAGE
    previous = (
        signal.signal(signal.SIGTERM, _on_sigterm) if threading.current_thread() is threading.main_thread() else None
    )
    _quiet_prefect_tracebacks()
    try:
        return COMMANDS[args.command](args)
    except FitauditError as exc:
        print(f"fitaudit {args.command}: {exc}", file=sys.stderr)
        return EXIT_ERROR
    except OSError as exc:
        print(f"fitaudit {args.command}: {_os_error_line(exc)}", file=sys.stderr)
        return EXIT_ERROR
    except KeyboardInterrupt:
        print("fitaudit: interrupted", file=sys.stderr)
        return EXIT_ERROR
    except Terminated:
        print("fitaudit: terminated (SIGTERM); the next run settles the interrupted one", file=sys.stderr)
        return 128 + signal.SIGTERM
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


if __name__ == "__main__":
    sys.exit(main())
