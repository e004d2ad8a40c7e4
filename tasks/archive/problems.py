"""What the archive reports: the error that refuses a change and the findings of verification."""

from __future__ import annotations

import dataclasses

from fitaudit.core.exceptions import FitauditError

NOTE_KINDS = frozenset({"pending", "leftover", "acknowledged"})


class ArchiveError(FitauditError):
    """The archive is in a state that forbids the requested change; the message says what to do."""


@dataclasses.dataclass(frozen=True)
class ArchiveProblem:
    """One finding of :func:`verify_archive`.

    ``kind`` is one of ``chain``, ``missing``, ``added``, ``changed``, ``unrecorded``, ``layout``,
    ``params``, ``journal`` (problems) or ``pending``, ``leftover``, ``acknowledged`` (notes, see
    ``NOTE_KINDS``; ``acknowledged`` is a problem recorded by an ``acknowledgement`` chain entry);
    ``where`` names the file or chain line, relative to the archive root.
    """

    kind: str
    where: str
    message: str

    @property
    def is_note(self) -> bool:
        """True for notes (an interrupted publication covered by a journal, private leftovers)."""
        return self.kind in NOTE_KINDS

    def to_dict(self) -> dict[str, str]:
        """Plain-dict form."""
        return dataclasses.asdict(self)

    def __str__(self) -> str:
        return f"{self.where}: {self.message}"
