"""The chain's meaning: the runs it records, with their purges and sign-offs."""

from __future__ import annotations

import dataclasses
import datetime as _dt
import pathlib

from .chain import _RESTORE_OR_ACKNOWLEDGE, _acknowledgements, _Chain, _intact_chain
from .layout import _CHAIN, _HEX64, _RUN_PATH, SAFE_NAME
from .problems import ArchiveError, ArchiveProblem


@dataclasses.dataclass
class _RunRecord:
    run_id: str
    path: str
    as_of: str
    manifest_sha256: str
    report_sha256: str | None
    line: int
    time: str
    purged_line: int | None = None
    signoffs: list[dict] = dataclasses.field(default_factory=list)


def _run_payload_problem(payload: dict) -> str | None:
    match = _RUN_PATH.fullmatch(str(payload.get("path")))
    if not (isinstance(payload.get("run_id"), str) and SAFE_NAME.fullmatch(payload["run_id"])):
        return "payload has no safe run_id"
    if not match or match["run_id"] != payload["run_id"]:
        return "payload path is not runs/<YYYY>/<run_id>"
    if not _HEX64.fullmatch(str(payload.get("manifest_sha256"))):
        return "payload has no manifest_sha256"
    try:
        _dt.date.fromisoformat(str(payload.get("as_of")))
    except ValueError:
        return "payload has no ISO as_of date"
    return None


def _interpret(chain: _Chain) -> tuple[dict[str, _RunRecord], list[ArchiveProblem]]:
    """Follow run, purge and sign-off entries; return the run records and inconsistencies."""
    runs: dict[str, _RunRecord] = {}
    problems: list[ArchiveProblem] = []
    for line, entry in chain.entries:
        where, payload = f"{_CHAIN} line {line}", entry["payload"]
        if entry["kind"] == "run":
            problem = _run_payload_problem(payload)
            if problem:
                problems.append(ArchiveProblem("chain", where, problem))
            elif payload["run_id"] in runs:
                first = runs[payload["run_id"]].line
                problems.append(
                    ArchiveProblem("chain", where, f"records run {payload['run_id']} again (first at line {first})")
                )
            else:
                runs[payload["run_id"]] = _RunRecord(
                    payload["run_id"],
                    payload["path"],
                    payload["as_of"],
                    payload["manifest_sha256"],
                    payload.get("report_sha256"),
                    line,
                    entry["time"],
                )
        elif entry["kind"] == "purge":
            items = payload.get("runs")
            if not isinstance(items, list) or not items:
                problems.append(ArchiveProblem("chain", where, "purge payload has no list of runs"))
                continue
            for item in items:
                record = runs.get(item.get("run_id")) if isinstance(item, dict) else None
                if record is None or record.purged_line is not None:
                    problems.append(
                        ArchiveProblem("chain", where, f"purges {item!r}, which is not a published, unpurged run")
                    )
                elif item.get("manifest_sha256") != record.manifest_sha256 or item.get("path") != record.path:
                    problems.append(
                        ArchiveProblem(
                            "chain", where, f"purge of run {record.run_id} does not match line {record.line}"
                        )
                    )
                else:
                    record.purged_line = line
        elif entry["kind"] == "signoff":
            record = runs.get(payload.get("run_id"))
            if record is None or record.purged_line is not None:
                message = f"signs off run {payload.get('run_id')!r}, which is not a published, unpurged run"
                problems.append(ArchiveProblem("chain", where, message))
            elif payload.get("manifest_sha256") != record.manifest_sha256:
                message = f"sign-off's manifest SHA-256 differs from run {record.run_id} at line {record.line}"
                problems.append(ArchiveProblem("chain", where, message))
            else:
                record.signoffs.append({**payload, "time": entry["time"], "line": line})
        elif entry["kind"] == "acknowledgement":
            for item in payload.get("runs") or []:  # run folders found without their chain entry, recorded as found
                problem = _run_payload_problem(item) if isinstance(item, dict) else "is not an object"
                if problem:
                    problems.append(ArchiveProblem("chain", where, f"acknowledged run: {problem}"))
                elif item["run_id"] in runs:
                    problems.append(
                        ArchiveProblem("chain", where, f"acknowledges run {item['run_id']}, which is already recorded")
                    )
                else:
                    runs[item["run_id"]] = _RunRecord(
                        item["run_id"],
                        item["path"],
                        item["as_of"],
                        item["manifest_sha256"],
                        item.get("report_sha256"),
                        line,
                        entry["time"],
                    )
    return runs, problems


def _intact_runs(root: pathlib.Path) -> tuple[_Chain, dict[str, _RunRecord]]:
    chain = _intact_chain(root)
    runs, problems = _interpret(chain)
    acks = _acknowledgements(chain)
    problems = [p for p in problems if not acks.covers(p)]
    if problems:
        raise ArchiveError(f"{problems[0]}; `fitaudit verify` lists every problem. {_RESTORE_OR_ACKNOWLEDGE}")
    return chain, runs
