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
:data:`RegistryEntry` is a union of entry kinds told apart by :func:`entry_kind`, with one member
today, :class:`ModelEntry` (fitaudit fits the model: ``spec`` and ``noise``).  An entry kind whose
forecasts come from outside (a ``forecasts`` block naming the mean, scale or quantile columns and
a horizon, instead of a ``spec``) is a subclass of :class:`EntryBase` with that block, tagged
``Tag("forecasts")`` in :data:`RegistryEntry`, and chosen by :func:`entry_kind` when the entry has
a ``forecasts`` key.
"""

from __future__ import annotations

import datetime as dt
import re
from typing import Annotated, Any, ClassVar, Literal

from pydantic import (
    AfterValidator,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Discriminator,
    Field,
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
from fitaudit.core.models import FAMILIES, get_family, model_from_dict
from fitaudit.core.noise import NOISE_LAWS, get_law
from fitaudit.core.settings import AuditSettings
from fitaudit.core.vocabulary import PARTITION_KINDS, SETTING_BOUNDS

from .._io import json_ready
from ..frequencies import FREQUENCIES
from .problems import listing, suggest

__all__ = [
    "SAFE_ID",
    "MAX_ID_LENGTH",
    "FREQUENCIES",
    "REFIT_POLICIES",
    "is_safe_id",
    "Persistence",
    "Policy",
    "SourceEntry",
    "Noise",
    "Windows",
    "ModelSettings",
    "EntryBase",
    "ModelEntry",
    "RegistryEntry",
    "entry_kind",
    "entry_from_dict",
    "RegistryDocument",
    "registry_json_schema",
]

#: Model ids and source names usable as file names: a letter or digit, then up to 127 letters,
#: digits, ``_``, ``.`` or ``-``.  ``\Z`` (not ``$``) so that a trailing newline never matches.
SAFE_ID = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,127}\Z")

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


class Policy(Block):
    """Thresholds fixed before the run, with their justification and approver.

    ``persistence`` escalates repeated ``refit`` verdicts; ``refit_policy`` says whether refitted
    parameters are promoted automatically or need approval; ``partitions`` chooses the cell
    partitions of the distribution gate (null: the audit's default).
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
        return out


class SourceEntry(Block):
    """An extract source: where the Parquet data live and which columns mean what."""

    shape_hint = "a mapping with uri, key, time, value and frequency"
    missing_hints = {"*": "a source needs {required}"}
    internal_fields = ("name", "line")

    name: SkipJsonSchema[str] = ""
    uri: Text = Field(
        description="A Parquet file, a folder of them, or a URI (s3://..., gs://...); relative to the registry's folder."
    )
    key: Text = Field(description="The series key column.")
    time: Text = Field(description="The timestamp column.")
    value: Text = Field(description="The target column (a model entry may name another).")
    exogenous: Columns = Field((), description="Input columns models of this source may use.")
    frequency: choice(tuple(FREQUENCIES)) = Field(
        description="; ".join(f"{code}: {meaning}" for code, meaning in FREQUENCIES.items())
    )
    partitioning: Annotated[
        Literal[PARTITIONINGS] | None, expect(f"one of {listing(PARTITIONINGS)}", PARTITIONINGS)
    ] = Field(None, description="hive for a hive-partitioned folder; null otherwise.")
    line: SkipJsonSchema[int] = 0

    @field_validator("exogenous")
    @classmethod
    def _not_a_role(cls, columns: tuple, info: ValidationInfo) -> tuple:
        roles = {r: info.data[r] for r in ("key", "time", "value") if r in info.data}
        for column in columns:
            role = next((r for r, c in roles.items() if c == column), None)
            if role is not None:
                raise invalid(f"column {column!r} is already the source's {role} column")
        return columns

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


#: A model spec: ``family`` and the family's hyperparameters (lists read as tuples).
Spec = Annotated[
    dict[str, Any],
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
    of which source it audits, over which windows, with which overrides of the policy."""

    shape_hint = "a mapping with id, owner, tier, source, series, spec, noise and windows"
    missing_hints = {"*": "required in every model entry ({required})"}
    internal_fields = ("line",)

    id: ModelId = Field(description="The model's id (it names files: letters, digits, '_', '.', '-').")
    owner: Text = Field(description="Who answers for the model.")
    tier: Tier = Field(description="Materiality, 1 (most material) to 3.")
    description: Description = ""
    source: Text = Field(description="The name of a source under `sources`.")
    series: SeriesKey = Field(description="The series' key in the source's key column.")
    value: Text = Field(None, description="The target column; default the source's value column.")
    exogenous: Annotated[
        tuple[Annotated[Text, AfterValidator(_declared_exogenous)], ...],
        AfterValidator(_distinct),
        expect("a list of column names, e.g. [temp_c]"),
    ] = Field((), description="Input columns, declared by the source.")
    windows: Windows
    settings: ModelSettings = Field(
        default_factory=ModelSettings, description="Overrides of the policy for this model."
    )
    last_validated: IsoDate = Field(None, description="When the model was last validated by a person.")
    line: SkipJsonSchema[int] = 0

    @model_validator(mode="before")
    @classmethod
    def _source_value(cls, data: Any, info: ValidationInfo) -> Any:
        """The target column defaults to the source's value column."""
        sources = _context(info).get("sources") or {}
        if isinstance(data, dict) and "value" not in data and isinstance(data.get("source"), str):
            source = sources.get(data["source"])
            if source is not None:
                return {**data, "value": source.value}
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
    def fit_window(self) -> int:
        """Observations the refit uses."""
        return self.windows.fit

    @property
    def audit_window(self) -> int:
        """Observations the production check scores."""
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
            **extra,
        )


class ModelEntry(EntryBase):
    """An entry whose model fitaudit fits: a ``spec`` (family and hyperparameters, ready for
    :func:`fitaudit.core.models.model_from_dict`) and a ``noise`` law."""

    key_order = ("id", "owner", "tier", "description", "source", "series", "value", "exogenous", "spec", "noise")

    spec: Spec = Field(description="The model: its family and the family's hyperparameters.")
    noise: Annotated[Noise, BeforeValidator(_law_alone, json_schema_input_type=LawName | Noise)] = Field(
        description="The law of the innovations: its name, or a mapping with a fixed shape."
    )

    def noise_law(self) -> dict:
        """The noise law as the core's audit functions take it: ``{"law": name, "shape": value or None}``."""
        return self.noise.to_dict()


def entry_kind(data: Any) -> str:
    """Which kind of entry ``data`` is (the tag of its member of :data:`RegistryEntry`)."""
    return "model"


#: Any registry entry, its kind chosen by :func:`entry_kind`.
RegistryEntry = Annotated[Annotated[ModelEntry, Tag("model")], Discriminator(entry_kind)]

_ENTRY = TypeAdapter(RegistryEntry)


def _tuples(value: Any) -> Any:
    if isinstance(value, list | tuple):
        return tuple(_tuples(v) for v in value)
    if isinstance(value, dict):
        return {k: _tuples(v) for k, v in value.items()}
    return value


def entry_from_dict(data: dict) -> ModelEntry:
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
