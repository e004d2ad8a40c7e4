"""Checks that pause for their map and gate, so that many checks are scored in one vectorised call.

Scoring a check (:func:`fitaudit.core.checks.score_frozen`, the refit check) starts with three
computations on its PIT values: the counts in equiprobable cells, the divergence map over the
(alpha, beta) grid and the gate's statistics on its partitions; and two on its errors: their
autocovariances and those of their squares (the Ljung-Box and McLeod-Li gates, the report's
autocorrelations).  For one check they are some forty small numpy calls; for a hundred checks of
the same shape they are the same calls on a hundred rows, at a fraction of the cost per check
(docs/performance.md).

A check's steps are therefore a generator: it yields a :class:`MapRequest` when its PIT values
and errors are known and receives the :class:`MapAndGate` for them (or the exception their computation
raised, thrown in where the request was made).  :func:`run_steps` answers the requests of one
audit alone; :func:`lockstep` runs the steps of many audits side by side and answers the requests
of each round together (:func:`map_and_gate`).  Each row's arithmetic is its own, so every result
is bit for bit the one of the audit alone, whatever the other rows
(:func:`fitaudit.core.divergence.row_block`; tests/test_lockstep.py).
"""

from __future__ import annotations

import time
from collections.abc import Callable, Generator, Sequence
from dataclasses import dataclass
from typing import Any, TypeVar

import numpy as np

from .calibration import Gate
from .cells import cell_counts
from .diagnostics import autocovariances, square_autocovariances
from .divergence import DivergenceMap, divergence_map, row_block

__all__ = ["MapRequest", "MapAndGate", "Steps", "Waited", "map_and_gate", "run_steps", "lockstep"]

T = TypeVar("T")


@dataclass(frozen=True, eq=False)
class MapRequest:
    """A check's PIT values ``u`` (shape (n,)), scored in ``cells`` equiprobable cells on the
    grid ``alphas`` x ``betas`` with ``scaling`` (and ``r``) and by the distribution ``gate``;
    and its errors ``errors`` (shape (n,)), whose autocovariances up to lag ``lags`` the
    independence gate and the report read (None: not wanted)."""

    u: np.ndarray
    cells: int
    gate: Gate
    alphas: tuple
    betas: tuple
    scaling: str
    r: float | None
    errors: np.ndarray | None = None
    lags: int | None = None

    def group(self) -> tuple:
        """Requests with equal groups are computed in one call."""
        return (self.u.size, self.cells, self.gate.key(), self.alphas, self.betas, self.scaling, self.r, self.lags)


@dataclass(frozen=True, eq=False)
class MapAndGate:
    """The answer to a :class:`MapRequest`: the cell counts (shape (cells,)), the divergence map
    with its classical members, the gate's statistics (shape (partitions, members)), each of the
    gate's partitions' cell counts (:meth:`~fitaudit.core.calibration.Gate.counts`) and, when
    asked for, the errors' :func:`~fitaudit.core.diagnostics.autocovariances` and those of their
    squares (:func:`~fitaudit.core.diagnostics.square_autocovariances`), each of shape (lags + 1,)."""

    counts: np.ndarray
    map: DivergenceMap
    gate_statistics: np.ndarray
    partition_counts: tuple
    autocovariances: np.ndarray | None = None
    square_autocovariances: np.ndarray | None = None


#: The steps of a check or an audit: yields requests, receives their answers, returns its result.
Steps = Generator[MapRequest, "MapAndGate", T]


def _compute(requests: Sequence[MapRequest]) -> list[MapAndGate]:
    """The answers to requests of one group, in row blocks whose rows do not affect each other."""
    first = requests[0]
    s, gate = first.cells, first.gate
    probs = np.full(s, 1.0 / s)
    block = row_block(max(s, sum(part.s for part in gate.partitions)))
    out: list[MapAndGate] = []
    for lo in range(0, len(requests), block):
        rows = requests[lo : lo + block]
        u = np.stack([r.u for r in rows])
        counts = cell_counts(u, s)
        dmap = divergence_map(counts, probs, first.alphas, first.betas, first.scaling, first.r)
        part_counts = gate.counts(u)
        g = gate.statistics_of_counts(part_counts)
        cov = cov_sq = [None] * len(rows)
        if first.lags is not None:
            errors = np.stack([r.errors for r in rows])
            cov, cov_sq = autocovariances(errors, first.lags), square_autocovariances(errors, first.lags)
        out += [
            MapAndGate(counts[i], dmap.row(i), g[i], tuple(c[i] for c in part_counts), cov[i], cov_sq[i])
            for i in range(len(u))
        ]
    return out


def map_and_gate(requests: Sequence[MapRequest]) -> list[MapAndGate | Exception]:
    """The answers to ``requests``, in order: requests of one group (:meth:`MapRequest.group`)
    are computed together.  When a group's computation raises, each of its requests is computed
    alone, and a request whose computation raises is answered with its exception (the check
    then meets it where it made the request, as if it had computed the map itself)."""
    groups: dict[tuple, list[int]] = {}
    for i, request in enumerate(requests):
        groups.setdefault(request.group(), []).append(i)
    answers: list[Any] = [None] * len(requests)
    for members in groups.values():
        try:
            computed: list[Any] = _compute([requests[i] for i in members])
        except Exception:  # find the request that failed; the others are answered as usual
            computed = []
            for i in members:
                try:
                    computed += _compute([requests[i]])
                except Exception as exc:
                    computed.append(exc)
        for i, answer in zip(members, computed):
            answers[i] = answer
    return answers


@dataclass(frozen=True)
class _Finished:
    value: Any


def _advance(steps: Steps, answer: Any) -> MapRequest | _Finished:
    """Resume ``steps`` with ``answer`` (None: start it; an exception: thrown in); its next request,
    or what it returned."""
    try:
        if answer is None:
            return next(steps)
        if isinstance(answer, BaseException):
            return steps.throw(answer)
        return steps.send(answer)
    except StopIteration as stop:
        return _Finished(stop.value)


def run_steps(steps: Steps[T]) -> T:
    """Run one audit's (or check's) ``steps`` alone, answering each request on its own; its result."""
    return lockstep([steps])[0]


def lockstep(
    all_steps: Sequence[Steps],
    resume: Callable[[int, Callable[[], MapRequest | Any]], Any] | None = None,
) -> list:
    """Run many audits' steps side by side; their results, in order.

    Each round resumes every audit that waits for an answer, until it makes its next request or
    finishes, then answers the round's requests together (:func:`map_and_gate`).

    Parameters
    ----------
    all_steps : sequence of generators
        Each audit's steps (as :func:`run_steps` takes them).
    resume : callable, optional
        ``resume(i, advance)`` runs ``advance()``, the i-th audit's next stretch, and returns what
        it returns; a caller that bounds or contains each audit (the audit stage's time limit per
        model) wraps it.  Anything it returns that is neither a request nor the audit's finish
        (its own result for a failed audit) becomes the i-th result, and those steps are closed.
    """
    resume = resume if resume is not None else (lambda i, advance: advance())
    results: list[Any] = [None] * len(all_steps)
    waiting: dict[int, MapRequest] = {}

    def go(i: int, answer: Any) -> None:
        step = resume(i, lambda: _advance(all_steps[i], answer))
        if isinstance(step, MapRequest):
            waiting[i] = step
            return
        if isinstance(step, _Finished):
            results[i] = step.value
            return
        all_steps[i].close()
        results[i] = step

    for i in range(len(all_steps)):
        go(i, None)
    while waiting:
        order = list(waiting)
        answers = map_and_gate([waiting.pop(i) for i in order])
        for i, answer in zip(order, answers):
            go(i, answer)
    return results


class Waited:
    """Seconds an audit's steps spent waiting for their answers, so that its timings count only
    its own work when it runs in :func:`lockstep` beside others.

    >>> def steps():
    ...     answer = yield "request"
    ...     return answer
    >>> waited = Waited()
    >>> run = waited.over(steps())
    >>> next(run)
    'request'
    >>> try:
    ...     run.send(42)
    ... except StopIteration as stop:
    ...     print(stop.value, waited.take() >= 0.0, waited.take(), waited.total >= 0.0)
    42 True 0.0 True
    """

    def __init__(self) -> None:
        self._seconds = 0.0
        self.total = 0.0  #: every second waited

    def take(self) -> float:
        """The seconds waited since the last call, and start again from zero."""
        seconds, self._seconds = self._seconds, 0.0
        return seconds

    def over(self, steps: Steps[T]) -> Steps[T]:
        """``yield from steps``, counting the time between each request and its answer."""
        answer: Any = None
        while True:
            step = _advance(steps, answer)
            if isinstance(step, _Finished):
                return step.value
            t0 = time.perf_counter()
            try:
                answer = yield step
            except GeneratorExit:
                steps.close()
                raise
            except BaseException as exc:  # thrown in: passed on to the steps
                answer = exc
            seconds = time.perf_counter() - t0
            self._seconds += seconds
            self.total += seconds
