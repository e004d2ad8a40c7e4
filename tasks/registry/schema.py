"""The registry's schema: strict pydantic models of the policy, the sources and the model entries.

One statement of what a registry may say.  The loader (:mod:`.loader`) validates a file against
it, ``fitaudit registry schema`` prints it as JSON Schema for editors, and the validated models
are the values the rest of fitaudit works with (a :class:`ModelEntry` travels through staging and
builds its own :class:`~fitaudit.core.audit.AuditSettings` and noise law).

Every block refuses unknown keys (``extra="forbid"``) and converts nothing (``strict=True``:
``'99'`` is not a number, ``yes`` is not text).  The bounds and options of the settings come from
:data:`fitaudit.core.vocabulary.SETTING_BOUNDS`, the same constraints ``AuditSettings`` checks.
Rules that involve several fields are model validators of the smallest block holding them
(``windows``: audit <= fit; ``persistence``: k <= n; a noise law's shape); rules that need the rest
of the registry (a model's source exists and declares its exogenous columns) read the declared
sources from the validation context the loader passes.

Errors are raised in two custom kinds that :mod:`.problems` writes up with the line and the value
as written: ``expected`` (type or bounds; says what is valid) and ``invalid`` (a rule, with its
message); ``ctx["at"]`` points below the failing value.

Entry variants
--------------
:data:`RegistryEntry` is a union of entry kinds told apart by :func:`entry_kind`:
:class:`ModelEntry` (fitaudit fits the model: ``spec``, ``noise``, ``windows.fit``) and
:class:`ForecastEntry` (the forecasts come from elsewhere: a ``forecasts`` block naming the
columns of the source that state each predictive distribution, and ``windows.audit`` only).
An entry with a ``forecasts`` key is a forecast entry.  Both share :class:`EntryBase`.
"""

from __future__ import annotations

import datetime as dt
import math
import re
from typing import Annotated, Any, ClassVar, Literal

from pydantic import (
    AfterValidator,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Discriminator,
    Field,
    PlainValidator,
    Tag,
    TypeAdapter,
    ValidationError,
    ValidationInfo,
    WrapValidator,
    field_validator,
    model_validator,
)
from pydantic.json_schema import SkipJsonSchema
from pydantic_core import PydanticCustomError

from fitaudit.core._validation import Interval, Options
from fitaudit.core.cells import minimum_length
from fitaudit.core.models import FAMILIES, get_family, model_from_dict
from fitaudit.core.noise import NOISE_LAWS, get_law
from fitaudit.core.settings import AuditSettings
from fitaudit.core.vocabulary import PARTITION_KINDS, SETTING_BOUNDS

from .._io import SAFE_ID, json_ready  # SAFE_ID: model ids and source names usable as file names
from ..frequencies import ALIASES, FREQUENCIES, SEASONS, canonical_frequency, default_staleness, periods_after
from ..uris import (
    FILESYSTEMS,
    FILTER_OPS,
    SECRET_OPTIONS,
    filter_term_problem,
    is_object_store,
    resolve_uri,
    uri_template_problem,
)
from .problems import listing, suggest

__all__ = [
    "SAFE_ID",
    "MAX_ID_LENGTH",
    "FREQUENCIES",
    "REFIT_POLICIES",
    "is_safe_id",
    "Persistence",
    "DaysToAct",
    "OwnerNotice",
    "Policy",
    "SourceEntry",
    "Noise",
    "Windows",
    "ModelSettings",
    "EntryBase",
    "ModelEntry",
    "Forecasts",
    "ForecastWindows",
    "ForecastEntry",
    "RegistryEntry",
    "entry_kind",
    "entry_from_dict",
    "RegistryDocument",
    "registry_json_schema",
]

#: Longest model id: its report page ``<id>.html`` must itself be a :data:`SAFE_ID` name.
MAX_ID_LENGTH = 128 - len(".html")

#: Whether passing refits are promoted at once or wait for a person (``fitaudit promote``).
REFIT_POLICIES = ("automatic", "approval")

#: Layouts of a folder source (pyarrow dataset partitioning); null for a file or a flat folder.
PARTITIONINGS = ("hive",)

#: Keys that give a noise law's shape, and the law each spelling belongs to (``shape`` fits any).
SHAPE_KEYS = {"df": "student-t", "size": "negative-binomial", "shape": None}

_SHOW = 60  # characters of an offending value quoted in a message
_OWN_ERRORS = frozenset({"expected", "invalid"})


def is_safe_id(name: object) -> bool:
    """True when ``name`` is a string matching :data:`SAFE_ID`."""
    return isinstance(name, str) and SAFE_ID.match(name) is not None


# --------------------------------------------------------------------------------------------
# errors and constrained types
# --------------------------------------------------------------------------------------------
def invalid(message: str, at: tuple = (), on_key: bool = False) -> PydanticCustomError:
    """A broken rule, with its complete message (``at``: path below the failing value)."""
    return PydanticCustomError("invalid", "{message}", {"message": message, "at": tuple(at), "on_key": on_key})


def expect(what: str, options: tuple | None = None) -> WrapValidator:
    """Report any type or bounds error of the wrapped type as ``expected <what>``.

    Errors of the rules (``invalid``, or an inner ``expected``) and errors of a list's or a
    mapping's own items keep their message and place.
    """

    def wrap(value: Any, handler: Any) -> Any:
        try:
            return handler(value)
        except ValidationError as exc:
            errors = exc.errors()
            if any(e["type"] in _OWN_ERRORS for e in errors) or (
                isinstance(value, (tuple, dict)) and all(e["loc"] for e in errors)
            ):
                raise
            raise PydanticCustomError("expected", "expected {what}", {"what": what, "options": options}) from None

    return WrapValidator(wrap)


def _only(kind: type, what: str) -> WrapValidator:
    """Check only that the value is a ``kind`` (its items are validated one by one elsewhere)."""

    def wrap(value: Any, handler: Any) -> Any:
        if isinstance(value, kind):
            return value
        raise PydanticCustomError("expected", "expected {what}", {"what": what, "options": None})

    return WrapValidator(wrap)


def _interval_words(iv: Interval) -> str:
    lo, hi = iv.left, iv.right
    left_closed, right_closed = iv.closed in ("both", "left"), iv.closed in ("both", "right")
    if iv.kind is int:
        lo = None if lo is None else int(lo) + (0 if left_closed else 1)
        hi = None if hi is None else int(hi) - (0 if right_closed else 1)
        if lo is not None and hi is not None:
            return f"an integer from {lo} to {hi}"
        if lo is not None:
            return f"an integer >= {lo}"
        return "an integer" if hi is None else f"an integer <= {hi}"
    if lo is not None and hi is not None:
        if not left_closed and not right_closed:
            return f"a number in the open interval ({lo:g}, {hi:g})"
        if left_closed and right_closed:
            return f"a number from {lo:g} to {hi:g}"
        return f"a number in the interval {'[' if left_closed else '('}{lo:g}, {hi:g}{']' if right_closed else ')'}"
    if lo is not None:
        return f"a number {'>=' if left_closed else '>'} {lo:g}"
    return "a number" if hi is None else f"a number {'<=' if right_closed else '<'} {hi:g}"


def bounded(iv: Interval, words: str | None = None) -> Any:
    """The annotated type of an :class:`~fitaudit.core._validation.Interval` constraint
    (``words``: what is valid, when the interval's own description is not the clearest)."""
    limits: dict[str, Any] = {}
    if iv.left is not None:
        limits["ge" if iv.closed in ("both", "left") else "gt"] = iv.left
    if iv.right is not None:
        limits["le" if iv.closed in ("both", "right") else "lt"] = iv.right
    if iv.kind is float:
        limits["allow_inf_nan"] = False
    return Annotated[iv.kind, Field(**limits), expect(words or _interval_words(iv))]


def choice(options: tuple) -> Any:
    """One of ``options``, exactly as spelt."""
    return Annotated[Literal[tuple(options)], expect(f"one of {listing(options)}", tuple(options))]


def setting(name: str) -> Any:
    """The annotated type of a policy setting, from :data:`~fitaudit.core.vocabulary.SETTING_BOUNDS`."""
    (constraint,) = [c for c in SETTING_BOUNDS[name] if c is not None]
    if isinstance(constraint, Options):
        return choice(constraint.values)
    return bounded(constraint)


def _text(value: str) -> str:
    if "\x00" in value:
        raise invalid("text must not contain NUL characters")
    if not value.strip():
        raise invalid("must not be blank")
    return value


def _text_or_empty(value: str) -> str:
    if "\x00" in value:
        raise invalid("text must not contain NUL characters")
    return value


def _distinct(names: tuple) -> tuple:
    for i, name in enumerate(names):
        if name in names[:i]:
            raise invalid(f"column {name!r} is listed twice", at=(i,))
    return names


def _not_bool(value: Any) -> Any:
    if isinstance(value, bool):
        raise ValueError("a boolean")
    return value


def _key_text(value: Any) -> Any:
    return str(value) if isinstance(value, int) and not isinstance(value, bool) else value


def _iso_date(value: Any) -> Any:
    if value is None:
        return None
    if isinstance(value, dt.datetime):
        return value.date().isoformat()
    if isinstance(value, dt.date):
        return value.isoformat()
    if isinstance(value, str):
        try:
            return dt.date.fromisoformat(value).isoformat()
        except ValueError:
            pass
    raise ValueError("not a date")


def _null_to_empty(value: Any) -> Any:
    return "" if value is None else value


#: Non-blank text.
Text = Annotated[str, AfterValidator(_text), expect("text")]

#: A value of an object store option (storage_options); a nested mapping holds the same.
StoreOption = str | bool | int | float | None
#: Text that may be empty (null reads as empty).
Description = Annotated[str, BeforeValidator(_null_to_empty), AfterValidator(_text_or_empty), expect("text")]
#: Distinct, non-blank column names.
Columns = Annotated[tuple[Text, ...], AfterValidator(_distinct), expect("a list of column names, e.g. [temp_c]")]
#: A series key: text, or an integer read as its digits.
SeriesKey = Annotated[
    str, BeforeValidator(_key_text, json_schema_input_type=str | int), AfterValidator(_text), expect("text")
]
#: A calendar date, kept as ``YYYY-MM-DD`` (null: none).
IsoDate = Annotated[
    str | None, BeforeValidator(_iso_date, json_schema_input_type=dt.date | None), expect("a date like 2026-06-30")
]


def _uri_template(value: str) -> str:
    problem = uri_template_problem(value)
    if problem:
        raise invalid(problem)
    return value


def _filter_term(value: Any) -> tuple:
    problem = filter_term_problem(value)
    if problem:
        raise invalid(problem)
    column, op, v = value
    return (column, op, tuple(v) if isinstance(v, list) else v)


#: One row-filter term ``[column, op, value]`` (see :mod:`fitaudit.tasks.uris`).
FilterTerm = Annotated[Any, AfterValidator(_filter_term)]
#: A calendar date, kept as ``YYYY-MM-DD``.
HolidayDate = Annotated[
    str, BeforeValidator(_iso_date, json_schema_input_type=dt.date), expect("a date like 2026-12-25")
]
PositiveNumber = bounded(Interval(float, 0.0, None, "neither"), "a positive number")
Tier = bounded(Interval(int, 1, 3))
Version = Annotated[Literal[1], BeforeValidator(_not_bool), expect("1 (the only registry version this fitaudit reads)")]


def _safe_model_id(value: str) -> str:
    if not is_safe_id(value) or len(value) > MAX_ID_LENGTH:
        raise invalid(
            f"id {value[:_SHOW]!r} is not allowed; use 1-{MAX_ID_LENGTH} letters, digits, "
            "'_', '.' or '-', starting with a letter or digit (ids become file names)"
        )
    return value


ModelId = Annotated[
    Text,
    AfterValidator(_safe_model_id),
    Field(json_schema_extra={"pattern": f"^[A-Za-z0-9][A-Za-z0-9_.-]{{0,{MAX_ID_LENGTH - 1}}}$"}),
]


def _distinct_kinds(kinds: tuple) -> tuple:
    if not kinds:
        raise invalid(f"give at least one partition kind ({listing(PARTITION_KINDS)})")
    for i, kind in enumerate(kinds):
        if kind in kinds[:i]:
            raise invalid(f"partition kind {kind!r} is listed twice", at=(i,))
    return kinds


Partitions = Annotated[
    tuple[choice(PARTITION_KINDS), ...],
    AfterValidator(_distinct_kinds),
    expect(f"a list of partition kinds ({listing(PARTITION_KINDS)})"),
]

_DEFAULT_PARTITIONS = getattr(AuditSettings, "partitions", None)


# --------------------------------------------------------------------------------------------
# blocks
# --------------------------------------------------------------------------------------------
class Block(BaseModel):
    """A mapping of the registry: unknown keys refused, nothing converted, immutable.

    Class attributes describe the block for messages: ``shape_hint`` (what a valid block looks
    like), ``missing_hints`` (why a key is needed, by key; ``"*"`` for any key, ``{required}``
    standing for the list of required keys) and ``internal_fields`` (fields fitaudit fills in,
    such as the line of an entry, which the YAML may not set).
    """

    model_config = ConfigDict(extra="forbid", strict=True, frozen=True)

    shape_hint: ClassVar[str] = "a mapping"
    missing_hints: ClassVar[dict[str, str]] = {}
    internal_fields: ClassVar[tuple[str, ...]] = ()
    key_order: ClassVar[tuple[str, ...]] = ()

    @classmethod
    def yaml_keys(cls) -> tuple[str, ...]:
        """The keys a registry may write in this block, in reading order (``key_order`` first)."""
        keys = [k for k in cls.model_fields if k not in cls.internal_fields]
        return tuple(sorted(keys, key=lambda k: cls.key_order.index(k) if k in cls.key_order else len(cls.key_order)))

    @classmethod
    def required_keys(cls) -> tuple[str, ...]:
        """The keys the registry must write."""
        return tuple(k for k in cls.yaml_keys() if cls.model_fields[k].is_required())

    @classmethod
    def missing_hint(cls, key: str) -> str:
        """Why ``key`` is needed (the message of a missing key, after ``missing; ``)."""
        hint = cls.missing_hints.get(key, cls.missing_hints.get("*", "required ({required})"))
        return hint.replace("{required}", listing(cls.required_keys()))

    def to_dict(self) -> dict:
        """Plain-Python (JSON-ready) view, in the schema's shape."""
        return json_ready({name: _plain(getattr(self, name)) for name in type(self).model_fields})


def _plain(value: Any) -> Any:
    if isinstance(value, tuple) and value and all(isinstance(v, Block) for v in value):
        return [v.to_dict() for v in value]
    return value.to_dict() if isinstance(value, Block) else value


def _context(info: ValidationInfo) -> dict:
    return info.context if isinstance(info.context, dict) else {}


class Persistence(Block):
    """``k`` of the last ``n`` audits with a ``refit`` verdict escalate to ``respecify``."""

    shape_hint = "a mapping like {k: 2, n: 3}"
    missing_hints = {"*": "persistence needs both k and n, e.g. {k: 2, n: 3}"}

    k: bounded(Interval(int, 1, None))
    n: bounded(Interval(int, 1, None))

    @model_validator(mode="after")
    def _k_within_n(self) -> Persistence:
        if self.k > self.n:
            raise invalid(f"k = {self.k} exceeds n = {self.n}; need 1 <= k <= n", at=("k",))
        return self


class DaysToAct(Block):
    """Days a model's owner has to act on an exception, by tier (1 the most material).

    The run page's action column gives each exception a deadline: the run's as-of date plus the
    days of the model's tier.
    """

    shape_hint = "a mapping like {tier_1: 7, tier_2: 14, tier_3: 28}"

    tier_1: setting("days_to_act") = Field(7, description="Days to act on an exception of a tier-1 model.")
    tier_2: setting("days_to_act") = Field(14, description="Days to act on an exception of a tier-2 model.")
    tier_3: setting("days_to_act") = Field(28, description="Days to act on an exception of a tier-3 model.")

    def for_tier(self, tier: int | None) -> int:
        """The days of ``tier``; for an unknown tier (an entry the registry rejected) the shortest."""
        days = {1: self.tier_1, 2: self.tier_2, 3: self.tier_3}
        return (
            days.get(tier, min(days.values()))
            if isinstance(tier, int) and not isinstance(tier, bool)
            else min(days.values())
        )


class OwnerNotice(Block):
    """Where an owner hears about their exceptions: a Prefect notification block."""

    shape_hint = "a mapping like {owner: 'South zone forecasting (P. Nair)', block: 'slack-webhook/south-zone'}"
    missing_hints = {"*": "a notice needs both owner and block, e.g. {owner: ..., block: slack-webhook/south-zone}"}

    owner: Text = Field(description="The owner, exactly as the model entries write it.")
    block: Annotated[
        str,
        Field(pattern=r"^[a-z0-9-]+/[A-Za-z0-9_.-]+$"),
        AfterValidator(_text),
        expect("a Prefect block as 'block-type/block-name', e.g. slack-webhook/south-zone"),
    ] = Field(description="The Prefect notification block that reaches the owner, as 'block-type/block-name'.")


class Policy(Block):
    """Thresholds fixed before the run, with their justification and approver.

    ``persistence`` escalates repeated ``refit`` verdicts; ``refit_policy`` says whether refitted
    parameters are promoted automatically or need approval; ``days_to_act`` gives each tier's
    deadline for acting on an exception; ``flow_timeout_minutes`` bounds a run's time;
    ``notify`` names the notification block of each owner who wants their exceptions sent;
    ``partitions`` chooses the cell partitions of the distribution gate (null: the audit's default).
    """

    shape_hint = "a mapping of thresholds"
    missing_hints = {
        "justification": "every threshold needs a written justification and an approver ('name, role') before the run",
        "approved_by": "every threshold needs a written justification and an approver ('name, role') before the run",
    }
    internal_fields = ("line",)

    level: setting("level") = Field(0.05, description="Significance level of each check (split between its two gates).")
    multiple_testing: setting("multiple_testing") = Field(
        "bh", description="p-value adjustment across the run's checks."
    )
    fdr_q: setting("fdr_q") = Field(
        0.10, description="Rate the adjustment controls (false discovery rate for bh and by)."
    )
    persistence: Persistence = Field(
        Persistence(k=2, n=3), description="A refit verdict in k of the last n audits escalates to respecify."
    )
    calibration: setting("calibration") = Field("simulated", description="How divergences become p-values.")
    replicates: setting("replicates") = Field(999, description="Simulated data sets per null table.")
    seed: setting("seed") = Field(0, description="Seed of every simulation: reruns reproduce every number.")
    refit_policy: choice(REFIT_POLICIES) = Field(
        "approval", description="approval: refits wait for `fitaudit promote`; automatic: promoted when they pass."
    )
    days_to_act: DaysToAct = Field(
        DaysToAct(), description="Days an owner has to act on an exception, by the model's tier."
    )
    flow_timeout_minutes: setting("flow_timeout_minutes") = Field(
        240, description="Prefect stops an audit or refit run that takes longer (minutes)."
    )
    notify: Annotated[tuple[OwnerNotice, ...], expect("a list of {owner, block} mappings")] = Field(
        (), description="Owners told of their exceptions by `fitaudit serve`'s notification automations."
    )
    max_staleness_days: Annotated[
        Annotated[int, Field(ge=0)] | None, expect("a whole number of days (0 or more), or null")
    ] = Field(
        None,
        description="Days the last observation of a source may lag behind the as-of date before its models are "
        "judged insufficient, for every source without its own max_staleness (never less than one period of the "
        "source's frequency); null: one period of each source's frequency.",
    )
    partitions: Partitions = Field(
        None,
        description="Cell partitions of the distribution gate; null uses the audit's default"
        + (f" ({', '.join(_DEFAULT_PARTITIONS)})." if _DEFAULT_PARTITIONS else "."),
    )
    justification: Text = Field(description="Why these thresholds (required).")
    approved_by: Text = Field(description="Who approved them, as 'name, role' (required).")
    line: SkipJsonSchema[int | None] = None

    @property
    def persistence_k(self) -> int:
        """``k`` of the persistence rule."""
        return self.persistence.k

    @property
    def persistence_n(self) -> int:
        """``n`` of the persistence rule."""
        return self.persistence.n

    def to_dict(self) -> dict:
        """Plain-Python view (``partitions`` only when given, so the default leaves results unchanged)."""
        out = super().to_dict()
        if self.partitions is None:
            del out["partitions"]
        if not self.notify:
            del out["notify"]
        if self.max_staleness_days is None:
            del out["max_staleness_days"]
        return out


def read_holiday_file(name: str, base_dir: str) -> tuple[str, ...]:
    """The dates of a holiday file: one ISO date per line, ``#`` lines and text after the date ignored.

    Raises the registry's ``invalid`` error (its message names the line) for an unreadable file
    or a line that does not start with a date.
    """
    import os

    path = os.path.join(base_dir, name)
    try:
        with open(path, encoding="utf-8-sig") as handle:
            lines = handle.read().splitlines()
    except (OSError, UnicodeDecodeError) as exc:
        reason = exc.strerror if isinstance(exc, OSError) and exc.strerror else type(exc).__name__
        raise invalid(
            f"cannot read holiday file {name!r} ({reason}; looked for {path}); give a UTF-8 text file relative to "
            "the registry's folder",
            at=("holiday_file",),
        ) from None
    days = []
    for number, line in enumerate(lines, start=1):
        text = line.strip()
        if not text or text.startswith("#"):
            continue
        first = re.split(r"[\s,;]", text, maxsplit=1)[0]
        try:
            days.append(dt.date.fromisoformat(first).isoformat())
        except ValueError:
            raise invalid(
                f"line {number} of holiday file {name!r} starts with {first[:_SHOW]!r}, not a date like 2026-12-25",
                at=("holiday_file",),
            ) from None
    return tuple(days)


class SourceEntry(Block):
    """An extract source: where the Parquet data live and which columns mean what."""

    shape_hint = "a mapping with uri, key, time, value and frequency"
    missing_hints = {"*": "a source needs {required}"}
    internal_fields = ("name", "line")

    name: SkipJsonSchema[str] = ""
    uri: Annotated[Text, AfterValidator(_uri_template)] = Field(
        description="A Parquet file, a folder of them, or a URI (s3://..., gs://...); relative to the registry's "
        "folder. It may hold the run's as-of date, e.g. exports/{as_of:%Y-%m-%d}/sales.parquet (strftime codes; a "
        "literal brace is doubled); the manifest records the resolved URI."
    )
    key: Text = Field(description="The series key column.")
    time: Text = Field(description="The timestamp column.")
    value: Text = Field(description="The target column (a model entry may name another).")
    exogenous: Columns = Field((), description="Input columns models of this source may use.")
    forecasts: Columns = Field(
        (),
        description="Columns holding forecasts issued elsewhere (means, scales, quantiles, issue times), "
        "one per row of the observation they predict; forecast entries name them.",
    )
    frequency: Annotated[choice(tuple(FREQUENCIES)), BeforeValidator(canonical_frequency)] = Field(
        description="; ".join(f"{code}: {meaning}" for code, meaning in FREQUENCIES.items())
        + "; older pandas spellings are read as today's ("
        + ", ".join(f"{old} as {new}" for old, new in ALIASES.items())
        + ")"
    )
    holidays: Annotated[tuple[HolidayDate, ...], expect("a list of dates like [2026-12-25, 2026-12-26]")] = Field(
        (), description="Dates business-day sources (frequency B) have no observation for."
    )
    filter: Annotated[
        tuple[FilterTerm, ...], expect("a list of [column, op, value] terms, e.g. [[region, in, [north, south]]]")
    ] = Field(
        (),
        description="Rows to keep, every term holding: [column, op, value] with op one of "
        + ", ".join(FILTER_OPS)
        + " (pyarrow's dataset filter terms; a list value for in and not in).",
    )
    holiday_file: Annotated[Text | None, expect("a file path relative to the registry's folder")] = Field(
        None,
        description="A text file of holiday dates for a business-day source, one ISO date per line (anything after "
        "the date, such as a name, and lines starting with # are ignored); joined with `holidays`.",
    )
    max_staleness: Annotated[
        Annotated[int, Field(ge=0)] | None, expect("a whole number of periods (0 or more), or null for the default")
    ] = Field(
        None,
        description="Periods of the source's frequency its last observation may lag behind the as-of date before "
        "its models are judged insufficient (default: the policy's max_staleness_days, and at least one period; "
        "one day's worth for frequencies finer than a day).",
    )
    partitioning: Annotated[
        Literal[PARTITIONINGS] | None, expect(f"one of {listing(PARTITIONINGS)}", PARTITIONINGS)
    ] = Field(None, description="hive for a hive-partitioned folder; null otherwise.")
    storage_options: Annotated[
        dict[Text, StoreOption | dict[Text, StoreOption]] | None,
        expect("a mapping of option names to values, e.g. {endpoint_url: 'https://s3.example.net', region: eu-west-1}"),
    ] = Field(
        None,
        repr=False,
        description="Options of an object store's file system (s3fs's names: endpoint_url, region, anon, key, "
        "secret, token, ...; other names go to the file system as written). Keep secrets in a credentials Block.",
    )
    credentials: Annotated[Text | None, expect("a Prefect Block written block-type/name")] = Field(
        None,
        description="A Prefect Block holding the object store's credentials, written block-type/name: "
        "fitaudit-store-credentials/<name> (fitaudit's ObjectStoreCredentials) or aws-credentials/<name> "
        "(prefect-aws's AwsCredentials, when installed); storage_options given beside it win.",
    )
    filesystem: Annotated[Literal[FILESYSTEMS], expect(f"one of {listing(FILESYSTEMS)}", FILESYSTEMS)] = Field(
        "arrow",
        description="How an object store is opened: arrow (pyarrow's S3FileSystem, no extra package) or fsspec "
        "(fsspec.filesystem(scheme, **storage_options), e.g. s3fs or gcsfs installed beside fitaudit).",
    )
    line: SkipJsonSchema[int] = 0

    @field_validator("storage_options", "credentials")
    @classmethod
    def _object_store_only(cls, value: Any, info: ValidationInfo) -> Any:
        uri = info.data.get("uri")
        if value is not None and uri is not None and not is_object_store(uri):
            raise invalid(f"{info.field_name} apply to an object store's uri (s3://..., gs://...), not to {uri!r}")
        if info.field_name == "credentials" and value is not None and value.count("/") != 1:
            raise invalid(f"write the Block as block-type/name, e.g. fitaudit-store-credentials/{value}")
        return value

    @field_validator("exogenous")
    @classmethod
    def _not_a_role(cls, columns: tuple, info: ValidationInfo) -> tuple:
        roles = {r: info.data[r] for r in ("key", "time", "value") if r in info.data}
        for column in columns:
            role = next((r for r, c in roles.items() if c == column), None)
            if role is not None:
                raise invalid(f"column {column!r} is already the source's {role} column")
        return columns

    @field_validator("forecasts")
    @classmethod
    def _forecasts_not_a_role(cls, columns: tuple, info: ValidationInfo) -> tuple:
        roles = {r: info.data[r] for r in ("key", "time", "value") if r in info.data}
        exogenous = info.data.get("exogenous") or ()
        for i, column in enumerate(columns):
            role = next((r for r, c in roles.items() if c == column), None)
            if role is not None:
                raise invalid(f"column {column!r} is already the source's {role} column", at=(i,))
            if column in exogenous:
                raise invalid(
                    f"column {column!r} is already an exogenous column; a column holds inputs or forecasts, not both",
                    at=(i,),
                )
        return columns

    @field_validator("holidays")
    @classmethod
    def _holidays_of_business_days(cls, days: tuple, info: ValidationInfo) -> tuple:
        if days and info.data.get("frequency") not in (None, "B"):
            raise invalid(f"holidays apply to business days (frequency B) only, not to {info.data['frequency']!r}")
        return tuple(sorted(set(days)))

    @field_validator("holiday_file")
    @classmethod
    def _holiday_file_of_business_days(cls, name: str | None, info: ValidationInfo) -> str | None:
        if name is not None and info.data.get("frequency") not in (None, "B"):
            raise invalid(
                f"a holiday file applies to business days (frequency B) only, not to {info.data['frequency']!r}"
            )
        return name

    @model_validator(mode="after")
    def _join_holiday_file(self, info: ValidationInfo) -> SourceEntry:
        """Read the holiday file (when the loader gives the registry's folder) into ``holidays``."""
        base_dir = _context(info).get("base_dir")
        if self.holiday_file is None or base_dir is None:
            return self  # a re-validated source already holds the file's dates in holidays
        days = read_holiday_file(self.holiday_file, base_dir)
        return self.model_copy(update={"holidays": tuple(sorted(set(self.holidays) | set(days)))})

    def to_dict(self) -> dict:
        """Plain-Python view.

        ``forecasts``, ``holidays``, ``filter`` and ``max_staleness`` appear only when the source declares them.
        """
        out = super().to_dict()
        if not self.forecasts:
            del out["forecasts"]
        if not self.holidays:
            del out["holidays"]
        if self.holiday_file is None:
            del out["holiday_file"]
        if not self.filter:
            del out["filter"]
        else:
            out["filter"] = [[c, op, list(v) if isinstance(v, tuple) else v] for c, op, v in self.filter]
        if self.max_staleness is None:
            del out["max_staleness"]
        if self.storage_options is None:
            del out["storage_options"]
        else:  # a secret written in the registry never leaves it
            out["storage_options"] = {k: "***" if k in SECRET_OPTIONS else v for k, v in self.storage_options.items()}
        for name, default in (("credentials", None), ("filesystem", "arrow")):
            if out[name] == default:
                del out[name]
        return out

    def for_as_of(self, as_of: dt.date) -> SourceEntry:
        """This source with its URI's as-of template filled in (itself when the URI has none)."""
        resolved = resolve_uri(self.uri, as_of)
        return self if resolved == self.uri else self.model_copy(update={"uri": resolved})

    @property
    def staleness_allowed(self) -> int:
        """``max_staleness``, or the frequency's default (:func:`~fitaudit.tasks.frequencies.default_staleness`)."""
        return default_staleness(self.frequency) if self.max_staleness is None else self.max_staleness

    def periods_allowed(self, policy_days: int | None, end: Any) -> int:
        """Periods the last observation may lag behind ``end`` (the as-of date's last instant).

        The source's own ``max_staleness`` when it sets one; otherwise the grid periods of the
        policy's ``max_staleness_days`` before ``end``, and never fewer than the frequency's
        default of one period (a monthly source is not stale a week after its month ended).
        """
        if self.max_staleness is not None or policy_days is None:
            return self.staleness_allowed
        import numpy as np

        end = np.datetime64(end, "ns")
        since = end - np.timedelta64(int(policy_days), "D").astype("timedelta64[ns]")
        return max(self.staleness_allowed, periods_after(self.frequency, since, end, self.holidays))

    @model_validator(mode="after")
    def _three_roles(self) -> SourceEntry:
        roles = {"key": self.key, "time": self.time, "value": self.value}
        if len(set(roles.values())) < 3:
            raise invalid(f"key, time and value must be three different columns, got {roles}")
        return self


class Noise(Block):
    """The law of a model's innovations, with an optional fixed shape.

    Written as the law's name (``noise: normal``) or as a mapping with one shape key: ``df`` for
    ``student-t``, ``size`` for ``negative-binomial``, or ``shape`` for any law with a shape.  The
    validated value keeps the shape in ``shape`` whichever key gave it.
    """

    shape_hint = "a noise law: its name (e.g. normal) or a mapping like {law: student-t, df: 5}"
    missing_hints = {"law": "e.g. {law: student-t, df: 5}"}

    law: Annotated[Text, Field(json_schema_extra={"enum": sorted(NOISE_LAWS)})] = Field(description="The noise law.")
    df: PositiveNumber = Field(
        None, description="Degrees of freedom of the student-t law (fixed; estimated when absent)."
    )
    size: PositiveNumber = Field(None, description="Size of the negative-binomial law (fixed; estimated when absent).")
    shape: PositiveNumber = Field(None, description="The law's shape, whatever the law.")

    @model_validator(mode="before")
    @classmethod
    def _null_shape(cls, data: Any) -> Any:
        """``shape: null`` is an estimated shape, as the plain view (:meth:`to_dict`) writes it."""
        if isinstance(data, dict) and "shape" in data and data["shape"] is None:
            return {k: v for k, v in data.items() if k != "shape"}
        return data

    @model_validator(mode="after")
    def _known_law(self) -> Noise:
        given = [k for k in SHAPE_KEYS if getattr(self, k) is not None]
        if len(given) > 1:
            raise invalid(f"give one shape parameter, got {listing(given)}")
        key = given[0] if given else None
        if SHAPE_KEYS.get(key) not in (None, self.law):
            raise invalid(
                f"{key!r} is the shape of the {SHAPE_KEYS[key]!r} law, not of {self.law!r}; use 'shape' or drop it",
                at=(key,),
                on_key=True,
            )
        shape = None if key is None else float(getattr(self, key))
        try:
            get_law(self.law, shape=shape)
        except Exception as exc:  # noqa: BLE001 - the noise module's message lists the valid laws
            raise invalid(str(exc), at=("law",)) from None
        if key in (None, "shape"):
            return self
        return self.model_copy(update={"shape": shape, key: None})

    def to_dict(self) -> dict:
        """``{"law": name, "shape": fixed shape or None}``, as the core's audit functions take it."""
        return {"law": self.law, "shape": self.shape}


def _law_alone(value: Any) -> Any:
    return {"law": value} if isinstance(value, str) else value


#: A noise law's name, for the JSON Schema (the core's message lists the laws when one is unknown).
LawName = Literal[tuple(sorted(NOISE_LAWS))]


class Windows(Block):
    """Numbers of observations: the refit uses the last ``fit``, the production check the last ``audit``."""

    shape_hint = "a mapping like {fit: 730, audit: 28} (numbers of observations)"
    missing_hints = {"*": "windows need fit and audit lengths in observations"}

    fit: setting("fit_window") = Field(description="Observations the refit uses (the most recent).")
    audit: setting("audit_window") = Field(description="Observations the production check scores (the most recent).")

    @model_validator(mode="after")
    def _audit_within_fit(self) -> Windows:
        if self.audit > self.fit:
            raise invalid(
                f"the audit window ({self.audit}) is longer than the fit window ({self.fit}); need fit >= audit >= 1",
                at=("audit",),
            )
        return self


class ModelSettings(Block):
    """A model's overrides of the policy (each absent key keeps the policy's value)."""

    shape_hint = "a mapping of policy overrides ('level', 'calibration', 'replicates')"

    level: setting("level") = None
    calibration: setting("calibration") = None
    replicates: setting("replicates") = None

    def to_dict(self) -> dict:
        """The overrides that were given."""
        return {k: v for k, v in super().to_dict().items() if v is not None}


def _buildable(spec: dict) -> dict:
    """A spec names a known family and builds (:func:`fitaudit.core.models.model_from_dict`)."""
    if "family" not in spec:
        raise invalid("missing; a spec needs a 'family' (e.g. arima)", at=("family",))
    family = spec["family"]
    if not isinstance(family, str):
        raise PydanticCustomError("expected", "expected {what}", {"what": "text", "options": None, "at": ("family",)})
    if not family.strip():
        raise invalid("must not be blank", at=("family",))
    try:
        cls = get_family(family)
    except Exception as exc:  # noqa: BLE001 - the family registry's own message lists the valid names
        raise invalid(str(exc), at=("family",)) from None
    try:
        model_from_dict(spec)
    except Exception as exc:  # noqa: BLE001 - any failure to build the spec rejects this entry only
        raise _spec_error(cls, spec, exc) from None
    return spec


def _spec_error(cls: type, spec: dict, exc: Exception) -> PydanticCustomError:
    """Point a spec-construction failure at the hyperparameter it names, when it names one."""
    import inspect

    message = str(exc) or type(exc).__name__
    unexpected = re.search(r"unexpected keyword argument '(\w+)'", message)
    if unexpected and unexpected.group(1) in spec:
        key = unexpected.group(1)
        valid = tuple(p for p in inspect.signature(cls).parameters if p not in ("self", "args", "kwargs"))
        return invalid(
            f"unknown hyperparameter {key!r} for family {cls.family!r}{suggest(key, valid)}; valid keys are "
            f"{listing(('family',) + valid)}",
            at=(key,),
            on_key=True,
        )
    named = re.search(r"'(\w+)' parameter", message)
    if named and named.group(1) in spec:
        return invalid(message, at=(named.group(1),))
    return invalid(message)


def _families_schema(schema: dict) -> None:
    schema.update(properties={"family": {"type": "string", "enum": sorted(FAMILIES)}}, required=["family"])


#: The word a spec writes for "the seasonal period of the source's calendar".
CALENDAR_PERIOD = "calendar"


def _calendar_period(spec: Any, info: ValidationInfo) -> Any:
    """Replace the word ``calendar`` in a spec's seasonal period by the source calendar's season.

    ``period: calendar`` (smoothing) and ``seasonal: [P, D, Q, calendar]`` (ARIMA) take the
    season of the model's source (5 for business days, 7 for daily data, 12 for monthly data,
    ...: :data:`fitaudit.tasks.frequencies.SEASONS`); the validated entry keeps the number.
    """
    if not isinstance(spec, dict):
        return spec
    seasonal = spec.get("seasonal")
    at: tuple | None = None
    if spec.get("period") == CALENDAR_PERIOD:
        at = ("period",)
    elif isinstance(seasonal, tuple | list) and len(seasonal) == 4 and seasonal[3] == CALENDAR_PERIOD:
        at = ("seasonal", 3)
    if at is None:
        return spec
    source = _declared_source(info)
    if source is None:
        raise invalid("'calendar' stands for the season of the model's source; name a valid source", at=at)
    season = SEASONS[source.frequency]
    if season < 2:
        raise invalid(
            f"source {source.name!r} has frequency {source.frequency!r}, whose calendar has no season; "
            "give the seasonal period as a number",
            at=at,
        )
    if at == ("period",):
        return {**spec, "period": season}
    return {**spec, "seasonal": (*seasonal[:3], season)}


#: A model spec: ``family`` and the family's hyperparameters (lists read as tuples); a seasonal
#: period may be written ``calendar`` (the source calendar's season).
Spec = Annotated[
    dict[str, Any],
    BeforeValidator(_calendar_period),
    AfterValidator(_buildable),
    expect("a mapping like {family: arima, order: [1, 0, 1]}"),
    Field(json_schema_extra=_families_schema),
]


# --------------------------------------------------------------------------------------------
# entries
# --------------------------------------------------------------------------------------------
def _declared_source(info: ValidationInfo) -> SourceEntry | None:
    """The model's source, when the loader passed the declared sources and the name is valid."""
    sources = _context(info).get("sources")
    name = info.data.get("source")
    return sources.get(name) if isinstance(sources, dict) and isinstance(name, str) else None


def _declared_exogenous(column: str, info: ValidationInfo) -> str:
    source = _declared_source(info)
    if source is None:
        return column
    if column not in source.exogenous:
        declared = listing(source.exogenous) or "none"
        raise invalid(
            f"column {column!r} is not declared by source {source.name!r}{suggest(column, source.exogenous)}; "
            f"its exogenous columns are {declared} (declare it under sources.{source.name}.exogenous)"
        )
    if column == (info.data.get("value") or source.value):
        raise invalid(f"column {column!r} is the model's target")
    return column


class EntryBase(Block):
    """What every registry entry says, whatever states its forecasts: who owns it, which series
    of which source it audits, with which overrides of the policy.  Its kinds add how the
    forecasts are stated and the windows (:class:`ModelEntry`, :class:`ForecastEntry`)."""

    shape_hint = (
        "a mapping with id, owner, tier, source, series and windows, and either spec and noise (a model "
        "fitaudit fits) or forecasts (forecasts made elsewhere)"
    )
    missing_hints = {"*": "required in every model entry ({required})"}
    internal_fields = ("line", "season")

    id: ModelId = Field(description="The model's id (it names files: letters, digits, '_', '.', '-').")
    owner: Text = Field(description="Who answers for the model.")
    tier: Tier = Field(description="Materiality, 1 (most material) to 3.")
    description: Description = ""
    source: Text = Field(description="The name of a source under `sources`.")
    series: SeriesKey = Field(description="The series' key in the source's key column.")
    value: Text = Field(None, description="The target column; default the source's value column.")
    settings: ModelSettings = Field(
        default_factory=ModelSettings, description="Overrides of the policy for this model."
    )
    last_validated: IsoDate = Field(None, description="When the model was last validated by a person.")
    line: SkipJsonSchema[int] = 0
    #: The season of the source's calendar (:data:`fitaudit.tasks.frequencies.SEASONS`), filled in
    #: from the source: the Ljung-Box lag rule of a model without a season uses it.
    season: SkipJsonSchema[int] = 1

    @model_validator(mode="before")
    @classmethod
    def _source_value(cls, data: Any, info: ValidationInfo) -> Any:
        """The target column defaults to the source's value column; the season is the source calendar's."""
        sources = _context(info).get("sources") or {}
        if isinstance(data, dict) and isinstance(data.get("source"), str):
            source = sources.get(data["source"])
            if source is not None:
                data = {**data, "season": SEASONS[source.frequency]}
                if "value" not in data:
                    data["value"] = source.value
        return data

    @field_validator("source")
    @classmethod
    def _known_source(cls, name: str, info: ValidationInfo) -> str:
        ctx = _context(info)
        if "sources" not in ctx:
            return name
        dropped = ctx.get("dropped") or {}
        if name in dropped:
            raise invalid(
                f"source {name!r} has {len(dropped[name])} problem(s) and was dropped; first: {dropped[name][0]}. "
                "Fix the source entry and this model will be audited"
            )
        if name not in ctx["sources"]:
            declared = listing(sorted(ctx["sources"])) or "none"
            raise invalid(f"unknown source {name!r}{suggest(name, ctx['sources'])}; declared sources are {declared}")
        return name

    @field_validator("value")
    @classmethod
    def _not_key_or_time(cls, value: str, info: ValidationInfo) -> str:
        source = _declared_source(info)
        if source is not None and value in (source.key, source.time):
            raise invalid(f"{value!r} is the source's key or time column; name a numeric value column")
        return value

    @property
    def audit_window(self) -> int:
        """Observations the audit scores (the most recent)."""
        return self.windows.audit

    def audit_settings(self, policy: Policy) -> AuditSettings:
        """The settings this model is audited with: the policy, this entry's overrides, its windows.

        The one place that combines them (the audit, the calibration planning, the candidate
        search and the refit all call it).
        """
        over = self.settings
        extra = {} if policy.partitions is None else {"partitions": policy.partitions}
        return AuditSettings(
            level=policy.level if over.level is None else over.level,
            calibration=policy.calibration if over.calibration is None else over.calibration,
            replicates=policy.replicates if over.replicates is None else over.replicates,
            seed=policy.seed,
            audit_window=self.windows.audit,
            season=self.season,
            **extra,
        )


class ModelEntry(EntryBase):
    """An entry whose model fitaudit fits: a ``spec`` (family and hyperparameters, ready for
    :func:`fitaudit.core.models.model_from_dict`), a ``noise`` law, and fit and audit windows."""

    key_order = (
        "id",
        "owner",
        "tier",
        "description",
        "source",
        "series",
        "value",
        "exogenous",
        "spec",
        "noise",
        "windows",
        "settings",
        "last_validated",
    )
    missing_hints = {
        "*": "required in every model entry ({required})",
        "spec": "a model fitaudit fits needs a spec, e.g. {family: arima, order: [1, 0, 1]}; for forecasts made "
        "elsewhere, give a 'forecasts' block instead of spec and noise",
    }

    exogenous: Annotated[
        tuple[Annotated[Text, AfterValidator(_declared_exogenous)], ...],
        AfterValidator(_distinct),
        expect("a list of column names, e.g. [temp_c]"),
    ] = Field((), description="Input columns, declared by the source.")
    spec: Spec = Field(description="The model: its family and the family's hyperparameters.")
    noise: Annotated[Noise, BeforeValidator(_law_alone, json_schema_input_type=LawName | Noise)] = Field(
        description="The law of the innovations: its name, or a mapping with a fixed shape."
    )
    windows: Windows

    @property
    def fit_window(self) -> int:
        """Observations the refit uses."""
        return self.windows.fit

    @property
    def staged_window(self) -> int:
        """Observations staged for the audit (the fit window)."""
        return self.windows.fit

    def noise_law(self) -> dict:
        """The noise law as the core's audit functions take it: ``{"law": name, "shape": value or None}``."""
        return self.noise.to_dict()


# --------------------------------------------------------------------------------------------
# forecast entries
# --------------------------------------------------------------------------------------------
def _column_or_positive(value: Any) -> Any:
    """A column name (text) or one positive, finite number (not a boolean)."""
    if isinstance(value, str):
        return _text(value)
    if isinstance(value, int | float) and not isinstance(value, bool) and math.isfinite(value) and value > 0:
        return float(value)
    raise PydanticCustomError(
        "expected", "expected {what}", {"what": "a column name or a positive number", "options": None}
    )


#: A column of predictive standard deviations, or one fixed positive value.
ColumnOrNumber = Annotated[str | float, PlainValidator(_column_or_positive, json_schema_input_type=str | float)]


def quantile_level(key: str) -> float | None:
    """The level a quantile key states (``"0.05"`` -> 0.05), or None when it is not a probability in (0, 1)."""
    try:
        level = float(key)
    except (TypeError, ValueError):
        return None
    return level if 0.0 < level < 1.0 else None


def _quantile_columns(columns: dict) -> dict:
    seen: dict[float, str] = {}
    for key in columns:
        level = quantile_level(key)
        if level is None:
            raise invalid(
                f"quantile level {key[:_SHOW]!r} is not a probability strictly between 0 and 1; name each column by "
                'its level, e.g. "0.05": q05 for the 5 % quantile (quoted: registry keys are text)',
                at=(key,),
                on_key=True,
            )
        if level in seen:
            raise invalid(
                f"quantile level {key!r} is the level of {seen[level]!r} again; keep one column per level",
                at=(key,),
                on_key=True,
            )
        seen[level] = key
    if len(seen) < 2:
        raise invalid(
            'state at least two quantile levels (e.g. {"0.05": q05, "0.5": q50, "0.95": q95}): the predictive '
            "distribution between and beyond them is interpolated from their spread"
        )
    names = tuple(columns.values())
    for i, name in enumerate(names):
        if name in names[:i]:
            raise invalid(
                f"column {name!r} is given for two levels; each level needs its own column", at=(list(columns)[i],)
            )
    return columns


#: Predictive quantile columns by level (the level as text: registry keys are text).
QuantileColumns = Annotated[
    dict[str, Text],
    AfterValidator(_quantile_columns),
    expect('a mapping of quantile levels to column names, e.g. {"0.05": q05, "0.5": q50, "0.95": q95}'),
]


class Forecasts(Block):
    """How a forecast entry states each predictive distribution: columns of its source, one row
    per observation predicted.

    One of three ways: ``mean`` and ``scale`` (a column of predictive standard deviations or one
    number) under a continuous ``noise`` law (default normal; a student-t needs its ``df``);
    ``mean`` under a count law (``poisson``, or ``negative-binomial`` with its ``size``); or
    ``quantiles``, a mapping of levels to columns.  ``horizon`` is the number of steps ahead the
    forecasts were issued, ``period`` the seasonal period of the naive benchmark and of the
    Ljung-Box lags, ``issued`` the column of the times the forecasts were issued.
    """

    shape_hint = 'a mapping like {quantiles: {"0.05": q05, "0.5": q50, "0.95": q95}} or {mean: fc_mean, scale: fc_sd}'
    key_order = ("mean", "scale", "noise", "quantiles", "horizon", "period", "issued")

    mean: Text = Field(
        None, description="Column of the predictive means (with 'scale' for a continuous law; alone for a count law)."
    )
    scale: ColumnOrNumber = Field(
        None, description="Column of the predictive standard deviations, or one fixed positive value."
    )
    noise: Annotated[Noise, BeforeValidator(_law_alone, json_schema_input_type=LawName | Noise)] = Field(
        None, description="The predictive law around 'mean' (default normal); a shape (df, size) must be given."
    )
    quantiles: QuantileColumns = Field(
        None,
        description='Predictive quantile columns by level, e.g. {"0.05": q05, "0.95": q95}: at least two levels '
        "strictly between 0 and 1 (instead of mean, scale and noise).",
    )
    horizon: bounded(Interval(int, 1, None)) = Field(1, description="Steps ahead the forecasts were issued.")
    period: bounded(Interval(int, 1, None)) = Field(
        1, description="Seasonal period: the naive benchmark y(t - period) and the Ljung-Box lags."
    )
    issued: Text = Field(
        None, description="Column of the times the forecasts were issued (timestamps), each before its observation."
    )

    @model_validator(mode="after")
    def _one_statement(self) -> Forecasts:
        if self.quantiles is not None:
            if self.mean is not None:
                raise invalid(
                    "state each predictive distribution one way: 'quantiles', or 'mean' (with 'scale' for a "
                    "continuous law); drop one of them",
                    at=("mean",),
                    on_key=True,
                )
            for key in ("scale", "noise"):
                if getattr(self, key) is not None:
                    raise invalid(
                        f"{key!r} belongs to a law stated by its mean; quantiles state the whole predictive "
                        f"distribution, so drop {key!r}",
                        at=(key,),
                        on_key=True,
                    )
            return self
        if self.mean is None:
            raise invalid(
                "no predictive distribution stated: give 'quantiles' (level: column, e.g. "
                '{"0.05": q05, "0.5": q50, "0.95": q95}), or \'mean\' (a column) with \'scale\' (a column or a '
                "number) for a continuous law, or 'mean' with a count law (noise: poisson)"
            )
        law = get_law(self.law()["law"], self.law()["shape"])  # the Noise block checked both
        if law.discrete:
            if self.scale is not None:
                raise invalid(
                    f"the {law.name} law takes no scale: its spread follows from the mean"
                    + (" and its size" if law.has_shape else "")
                    + "; drop 'scale'",
                    at=("scale",),
                    on_key=True,
                )
        elif self.scale is None:
            raise invalid(
                f"a {law.name} predictive law needs 'scale': the column of predictive standard deviations, or one "
                "fixed positive value (e.g. scale: fc_sd or scale: 1.5)"
            )
        if law.has_shape and law.shape is None:
            key = next((k for k, owner in SHAPE_KEYS.items() if owner == law.name), "shape")
            raise invalid(
                f"a stated {law.name} law needs its {key} (e.g. noise: {{law: {law.name}, {key}: 5}}): nothing is "
                "estimated from the actuals in a forecast audit",
                at=("noise",),
            )
        return self

    @property
    def statement(self) -> str:
        """``quantiles``, ``mean-scale`` or ``mean-count``
        (:data:`fitaudit.core.forecasts.STATEMENTS`)."""
        if self.quantiles is not None:
            return "quantiles"
        return "mean-count" if get_law(self.law()["law"], self.law()["shape"]).discrete else "mean-scale"

    def law(self) -> dict:
        """The stated law around the mean, ``{"law", "shape"}`` (normal when none is given)."""
        return self.noise.to_dict() if self.noise is not None else {"law": "normal", "shape": None}

    def levels(self) -> dict[float, str]:
        """Quantile columns by level (a float), lowest first; empty for a mean statement."""
        return dict(sorted((quantile_level(k), c) for k, c in (self.quantiles or {}).items()))

    def columns(self) -> dict[str, str]:
        """Every column the statement names, by what it holds (``mean``, ``scale``, ``quantile
        0.05``, ``issued``)."""
        out = {}
        if self.mean is not None:
            out["mean"] = self.mean
        if isinstance(self.scale, str):
            out["scale"] = self.scale
        for level, column in self.levels().items():
            out[f"quantile {level:g}"] = column
        if self.issued is not None:
            out["issued"] = self.issued
        return out

    def describe(self) -> str:
        """One line, e.g. ``forecasts (quantiles 0.05..0.95), 1-step``."""
        if self.quantiles is not None:
            levels = list(self.levels())
            what = (
                f"quantiles {levels[0]:g}..{levels[-1]:g}"
                if len(levels) > 2
                else "quantiles " + ", ".join(f"{x:g}" for x in levels)
            )
        else:
            law = self.law()
            name = law["law"] if law["shape"] is None else f"{law['law']}({law['shape']:g})"
            if isinstance(self.scale, float):
                what = f"mean, {name} with scale {self.scale:g}"
            elif self.scale is not None:
                what = f"mean and scale, {name}"
            else:
                what = f"mean, {name}"
        return f"forecasts ({what}), {self.horizon}-step" + (f", period {self.period}" if self.period > 1 else "")

    def to_dict(self) -> dict:
        """Plain-Python view (the keys given; ``noise`` as ``{"law", "shape"}``)."""
        out = super().to_dict()
        return {k: v for k, v in out.items() if v is not None}


class ForecastWindows(Block):
    """Numbers of observations of a forecast entry: the audit scores the last ``audit``; ``history``
    more before them (default as many) give the naive benchmark its scale."""

    shape_hint = "a mapping like {audit: 56} (numbers of observations)"
    missing_hints = {"*": "a forecast entry's windows need the audit length in observations, e.g. {audit: 56}"}

    audit: setting("audit_window") = Field(description="Observations whose forecasts are scored (the most recent).")
    history: bounded(Interval(int, 0, None)) = Field(
        None, description="Observations before the audit window for the naive benchmark (default: the audit length)."
    )

    @model_validator(mode="before")
    @classmethod
    def _no_fit(cls, data: Any) -> Any:
        if isinstance(data, dict) and "fit" in data:
            raise invalid(
                "a forecast entry has no fit window: fitaudit fits nothing, it scores the stated forecasts; "
                "give windows: {audit: N} (and optionally history: N)",
                at=("fit",),
                on_key=True,
            )
        return data

    def to_dict(self) -> dict:
        """The keys given."""
        return {k: v for k, v in super().to_dict().items() if v is not None}


class ForecastEntry(EntryBase):
    """An entry whose forecasts are made elsewhere (another library, a notebook, a vendor): its
    source holds, beside each actual, the forecast issued before it, stated as a predictive
    distribution (:class:`Forecasts`).  fitaudit audits the forecasts against their stated
    uncertainty (:func:`fitaudit.core.forecasts.audit_forecasts`) and never refits the model."""

    key_order = (
        "id",
        "owner",
        "tier",
        "description",
        "source",
        "series",
        "value",
        "forecasts",
        "windows",
        "settings",
        "last_validated",
    )

    forecasts: Forecasts = Field(description="The source's columns that state each predictive distribution.")
    windows: ForecastWindows

    @model_validator(mode="before")
    @classmethod
    def _nothing_to_fit(cls, data: Any) -> Any:
        if isinstance(data, dict):
            for key in ("spec", "noise", "exogenous"):
                if key in data:
                    where = "forecasts.noise" if key == "noise" else key
                    raise invalid(
                        f"a forecast entry has no {key!r}: fitaudit audits the forecasts its source states and fits "
                        f"nothing; drop {key!r}"
                        + (f" (the predictive law goes under {where})" if key == "noise" else "")
                        + ", or drop 'forecasts' to have fitaudit fit the model",
                        at=(key,),
                        on_key=True,
                    )
        return data

    @model_validator(mode="after")
    def _declared_and_long_enough(self, info: ValidationInfo) -> ForecastEntry:
        need = minimum_length(0) * self.forecasts.horizon
        if self.windows.audit < need:
            h = self.forecasts.horizon
            per = (
                f"each of the {h} interleaved subsequences of {h}-step forecasts needs {minimum_length(0)} observations"
                if h > 1
                else f"the cells of the distribution gate need {minimum_length(0)} observations"
            )
            raise invalid(
                f"the audit window ({self.windows.audit}) is too short: {per}, so give audit >= {need}",
                at=("windows", "audit"),
            )
        sources = _context(info).get("sources")
        source = sources.get(self.source) if isinstance(sources, dict) else None
        if source is None:
            return self
        for what, column in self.forecasts.columns().items():
            at = _column_at(what)
            if column == self.value:
                raise invalid(f"column {column!r} is the model's target; the {what} must be its own column", at=at)
            if column not in source.forecasts:
                declared = listing(source.forecasts) or "none"
                raise invalid(
                    f"column {column!r} is not declared by source {source.name!r}{suggest(column, source.forecasts)}; "
                    f"its forecast columns are {declared} (declare it under sources.{source.name}.forecasts)",
                    at=at,
                )
        return self

    @property
    def exogenous(self) -> tuple:
        """No inputs: the forecasts come ready made."""
        return ()

    @property
    def staged_window(self) -> int:
        """Observations staged for the audit: the audit window and the history before it."""
        history = self.windows.history if self.windows.history is not None else self.windows.audit
        return self.windows.audit + history

    def describe(self) -> str:
        """The statement in one line (:meth:`Forecasts.describe`)."""
        return self.forecasts.describe()


def _column_at(what: str) -> tuple:
    """Where in the entry the column stated for ``what`` (``mean``, ``quantile 0.05``, ...) is written."""
    if what.startswith("quantile "):
        return ("forecasts", "quantiles")
    return ("forecasts", what)


def entry_kind(data: Any) -> str:
    """Which kind of entry ``data`` is (the tag of its member of :data:`RegistryEntry`):
    ``forecasts`` when it has a ``forecasts`` block, else ``model``."""
    if isinstance(data, ForecastEntry) or (isinstance(data, dict) and "forecasts" in data):
        return "forecasts"
    return "model"


class _ByEntryKind:
    """JSON Schema of :data:`RegistryEntry` as :func:`entry_kind` decides: a forecast entry when
    the mapping has ``forecasts``, a model entry otherwise (``if``/``then``/``else``), so that an
    editor reports the problems of the kind meant rather than of both."""

    def __get_pydantic_json_schema__(self, core_schema: Any, handler: Any) -> dict:
        schema = handler(core_schema)
        members = schema.get("oneOf") or []
        forecast = [m for m in members if "ForecastEntry" in m.get("$ref", "")]
        model = [m for m in members if "ModelEntry" in m.get("$ref", "")]
        if len(members) != 2 or len(forecast) != 1 or len(model) != 1:
            return schema
        return {"if": {"type": "object", "required": ["forecasts"]}, "then": forecast[0], "else": model[0]}


#: Any registry entry, its kind chosen by :func:`entry_kind`.
RegistryEntry = Annotated[
    Annotated[ModelEntry, Tag("model")] | Annotated[ForecastEntry, Tag("forecasts")],
    Discriminator(entry_kind),
    _ByEntryKind(),
]

_ENTRY = TypeAdapter(RegistryEntry)


def _tuples(value: Any) -> Any:
    if isinstance(value, list | tuple):
        return tuple(_tuples(v) for v in value)
    if isinstance(value, dict):
        return {k: _tuples(v) for k, v in value.items()}
    return value


def entry_from_dict(data: dict) -> ModelEntry | ForecastEntry:
    """An entry back from its :meth:`~Block.to_dict` view (e.g. read from a staged batch file)."""
    return _ENTRY.validate_python(_tuples(data))


# --------------------------------------------------------------------------------------------
# the document
# --------------------------------------------------------------------------------------------
class RegistryDocument(Block):
    """A whole registry file (version 1).

    Validating it checks the document level: the version, the policy, and that ``sources`` is a
    mapping and ``models`` a list.  The loader validates each source and each model entry alone,
    so that one broken entry never sinks the others; the JSON Schema (:func:`registry_json_schema`)
    describes the entries in full.
    """

    shape_hint = "a mapping with 'version', 'policy', 'sources' and 'models'"
    missing_hints = {
        "version": "the first line of a registry should be 'version: 1'",
        "policy": "add a policy block with at least 'justification' and 'approved_by' "
        "(the thresholds must be fixed and approved before the run)",
        "sources": "declare at least one extract source (uri, key, time, value, frequency)",
        "models": "add a 'models:' list of model entries",
    }

    version: Version = Field(description="The registry format; 1.")
    policy: Policy
    sources: Annotated[dict[str, SourceEntry], _only(dict, "a mapping of source names to source entries")] = Field(
        description="Extract sources by name (letters, digits, '_', '.', '-')."
    )
    models: Annotated[
        tuple[RegistryEntry, ...], _only(tuple, "a list of model entries (each starting with '- id: ...')")
    ] = Field(description="The model entries.")


def registry_json_schema() -> dict:
    """The JSON Schema (draft 2020-12) of a registry file, for editors' completion and checks."""
    schema = RegistryDocument.model_json_schema()
    schema["title"] = "fitaudit registry (version 1)"
    return {"$schema": "https://json-schema.org/draft/2020-12/schema", **schema}
