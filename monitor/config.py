"""The YAML configuration: pydantic models, a loader whose errors name file, line and field.

A configuration lists the charts to keep. Each chart names the readings it takes (a chart
id in replays, an MQTT topic filter in the daemon), how readings form subgroups (a count or
a clock-aligned time window), the chart kinds, where the limits come from (standard values
or a Phase I baseline), the rules, and a hint for the crew::

    charts:
      - id: press-1/thickness
        topic: brightwater/press-1/thickness
        subgroup: {size: 5}
        kinds: [xbar_r, ewma, cusum]
        limits: {mean: 8.00, sigma: 0.04}
        rules: western-electric
        hint: Check the die inserts of press 1 for wear.

Every mistake comes back as one line ``file:line: field: what is wrong (what is allowed)``,
all mistakes of a file at once, never a traceback.
"""

from __future__ import annotations

import difflib
import math
import os
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Literal, TypeAlias

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator
from ruamel.yaml import YAML
from ruamel.yaml.comments import CommentedMap, CommentedSeq
from ruamel.yaml.error import MarkedYAMLError

from monitor.spc import (
    PRESETS,
    BaselinePlan,
    ChartKind,
    ChartSpec,
    ConfigError,
    CountSubgrouper,
    CusumSettings,
    EwmaSettings,
    ProcessParameters,
    Rule,
    RuleId,
    SigmaEstimator,
    WindowSubgrouper,
)
from monitor.spc.exact_scale import ExactScale
from monitor.topics import overlaps

if TYPE_CHECKING:
    from monitor.signal_pvalues import ParentChoice

__all__ = [
    "ChartConfig",
    "Config",
    "ConfigIssue",
    "ConfigProblems",
    "load_config",
    "parse_duration",
]

Loc: TypeAlias = tuple[str | int, ...]

_LEVEL = r"(?:[A-Za-z0-9][A-Za-z0-9._-]*|\{[A-Za-z_][A-Za-z0-9_]*\})"
_CHART_ID = re.compile(rf"^{_LEVEL}(/{_LEVEL})*$")
_PLACEHOLDER = re.compile(r"\{([A-Za-z_][A-Za-z0-9_]*)\}")
_PREFIX = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]*(/[A-Za-z0-9][A-Za-z0-9._-]*)*$")
_CLIENT_ID = re.compile(r"^[A-Za-z0-9._-]{1,64}$")
_DURATION = re.compile(r"^\s*([0-9]+(?:\.[0-9]*)?|\.[0-9]+)\s*(ms|s|m|h|d)?\s*$")
_UNIT_SECONDS = {"ms": 0.001, "s": 1.0, "m": 60.0, "h": 3600.0, "d": 86400.0, None: 1.0}


def parse_duration(value: object) -> float:
    """Seconds from a number or a string such as ``90s``, ``5m``, ``1.5h``, ``250ms``.

    Examples:
        >>> parse_duration("5m"), parse_duration(2), parse_duration("250ms")
        (300.0, 2.0, 0.25)
    """
    if isinstance(value, bool):
        raise ValueError("a duration is a number of seconds or a string like '90s', '5m', '1h'")  # noqa: TRY004 - pydantic reports ValueError
    if isinstance(value, int | float):
        seconds = float(value)
    elif isinstance(value, str) and (match := _DURATION.match(value)):
        seconds = float(match.group(1)) * _UNIT_SECONDS[match.group(2)]
    else:
        raise ValueError(f"{value!r} is not a duration; write seconds or a string like '90s', '5m', '1h'")
    if not math.isfinite(seconds) or seconds < 0:
        raise ValueError(f"a duration must be zero or more seconds, got {value!r}")
    return seconds


def _check_topic_filter(topic: str) -> str:
    """An MQTT topic filter: '+' fills a whole level, '#' only the last one."""
    if not topic or len(topic.encode()) > 65535 or "\x00" in topic:
        raise ValueError("a topic filter is a non-empty string without NUL characters")
    levels = topic.split("/")
    for i, level in enumerate(levels):
        if _PLACEHOLDER.fullmatch(level):
            continue
        if "#" in level and (level != "#" or i != len(levels) - 1):
            raise ValueError(f"'#' may only be a whole last level of a topic filter, got {topic!r}")
        if "+" in level and level != "+":
            raise ValueError(f"'+' must fill a whole level of a topic filter, got {topic!r}")
    return topic


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)


class SubgroupConfig(_Strict):
    """How readings form subgroups: ``size`` consecutive readings, or a time ``window``."""

    size: Annotated[int, Field(ge=1, le=10_000)] | None = None
    window: float | None = None
    min_size: Annotated[int, Field(ge=1, le=10_000)] = 1
    lateness: float = 0.0
    origin: float = 0.0

    @field_validator("window", "lateness", mode="before")
    @classmethod
    def _duration(cls, value: object) -> object:
        return None if value is None else parse_duration(value)


class BaselineConfig(_Strict):
    """Estimate the limits from the first subgroups (Phase I)."""

    subgroups: Annotated[int, Field(ge=2, le=100_000)] = 25
    sigma_from: SigmaEstimator | None = None
    exclude_out_of_control: bool = True
    max_rounds: Annotated[int, Field(ge=1, le=100)] = 10
    max_excluded_share: Annotated[float, Field(ge=0, lt=1)] = 0.25


class LimitsConfig(_Strict):
    """Standard values (mean and sigma; proportion for p; rate for u) or a baseline."""

    mean: float | None = None
    sigma: Annotated[float, Field(gt=0)] | None = None
    proportion: Annotated[float, Field(gt=0, lt=1)] | None = None
    rate: Annotated[float, Field(gt=0)] | None = None
    baseline: BaselineConfig | None = None

    @field_validator("mean")
    @classmethod
    def _finite(cls, value: float | None) -> float | None:
        if value is not None and not math.isfinite(value):
            raise ValueError("the mean must be a finite number")
        return value


class EwmaConfig(_Strict):
    """EWMA parameters: weight ``lambda`` of the newest subgroup and limit ``width`` (L)."""

    smoothing: Annotated[float, Field(gt=0, le=1, alias="lambda")] = 0.2
    width: Annotated[float, Field(gt=0, le=10)] = 3.0
    fast_initial_response: bool = False


class CusumConfig(_Strict):
    """CUSUM parameters in sigma units of the subgroup mean."""

    k: Annotated[float, Field(ge=0, le=10)] = 0.5
    h: Annotated[float, Field(gt=0, le=100)] = 5.0
    head_start: Annotated[float, Field(ge=0)] = 0.0


class RuleParams(_Strict):
    """Parameters a rule entry may override."""

    length: Annotated[int, Field(ge=1, le=1000)] | None = None
    count: Annotated[int, Field(ge=1, le=1000)] | None = None
    window: Annotated[int, Field(ge=1, le=1000)] | None = None
    sigma: Annotated[float, Field(gt=0, le=10)] | None = None


RuleEntry: TypeAlias = str | dict[str, RuleParams | None]


class PayloadConfig(_Strict):
    """How a message carries readings: a bare number, or JSON with paths to the fields."""

    format: Literal["number", "json"] = "number"
    value: str = "value"
    timestamp: str | None = None
    sequence: str | None = None
    exposure: str | None = None
    batch: Literal["none", "array", "columns"] = "none"
    items: str = ""
    max_bytes: Annotated[int, Field(ge=16, le=64_000_000)] = 1_000_000


class TimestampPolicy(_Strict):
    """What the daemon does with readings whose event time is far from when they arrive."""

    max_ahead: float | None = 600.0
    max_behind: float | None = None
    outside: Literal["reject", "receive_time"] = "reject"

    @field_validator("max_ahead", "max_behind", mode="before")
    @classmethod
    def _duration(cls, value: object) -> object:
        return None if value is None else parse_duration(value)


class ChartConfig(_Strict):
    """One monitored characteristic (or, with placeholders, one per matched topic level)."""

    id: str
    title: Annotated[str, Field(max_length=200)] = ""
    unit: Annotated[str, Field(max_length=40)] = ""
    topic: str | None = None
    payload: PayloadConfig = PayloadConfig()
    subgroup: SubgroupConfig = SubgroupConfig(size=1)
    kinds: Annotated[list[ChartKind], Field(min_length=1)]
    limits: LimitsConfig
    limit_sigma: Annotated[float, Field(gt=0, le=10)] = 3.0
    rules: str | list[RuleEntry] = "western-electric"
    ewma: EwmaConfig = EwmaConfig()
    cusum: CusumConfig = CusumConfig()
    moving_range_span: Annotated[int, Field(ge=2, le=100)] = 2
    hint: Annotated[str, Field(max_length=2000)] = ""
    readings_every: float | None = None
    flood_factor: Annotated[float, Field(gt=1, le=1000)] = 5.0
    timestamps: TimestampPolicy = TimestampPolicy()
    parent: Annotated[str, Field(min_length=1, max_length=400)] = "normal"
    probability_limits: bool = False

    @field_validator("readings_every", mode="before")
    @classmethod
    def _every(cls, value: object) -> object:
        return None if value is None else parse_duration(value)

    @field_validator("id")
    @classmethod
    def _chart_id(cls, value: str) -> str:
        if len(value) > 200 or not _CHART_ID.match(value):
            raise ValueError(
                "a chart id is 1-200 characters of letters, digits, '.', '_', '-', in levels "
                f"separated by single '/' (a level may be a {{placeholder}} of the topic), got {value!r}"
            )
        return value

    @property
    def placeholders(self) -> list[str]:
        """Names of the ``{placeholder}`` levels of the chart id."""
        return _PLACEHOLDER.findall(self.id)

    @field_validator("topic")
    @classmethod
    def _topic(cls, value: str | None) -> str | None:
        return None if value is None else _check_topic_filter(value)

    def rule_objects(self) -> tuple[Rule, ...]:
        """The configured rules as core objects (the config must have passed :func:`load_config`)."""
        rules, issues = _rules(self.rules, ())
        if issues:
            raise ConfigError(issues[0].message)
        return rules

    def parent_choice(self) -> ParentChoice:
        """The parent model setting, read (the config must have passed :func:`load_config`)."""
        from monitor.signal_pvalues import parse_parent_choice  # noqa: PLC0415 - laws load scipy parts

        return parse_parent_choice(self.parent)

    def spec(self) -> ChartSpec:
        """The core chart specification of this chart."""
        limits = self.limits
        attribute = self.kinds[0] in (ChartKind.P, ChartKind.U)
        standard = None
        baseline = None
        if limits.baseline is not None:
            b = limits.baseline
            baseline = BaselinePlan(
                subgroups=b.subgroups,
                estimator=b.sigma_from,
                exclude_out_of_control=b.exclude_out_of_control,
                max_rounds=b.max_rounds,
                max_excluded_share=b.max_excluded_share,
            )
        elif attribute:
            center = limits.proportion if self.kinds[0] is ChartKind.P else limits.rate
            standard = ProcessParameters(mean=float(center or 0.0), sigma=None)
        else:
            standard = ProcessParameters(mean=float(limits.mean or 0.0), sigma=limits.sigma)
        return ChartSpec(
            kinds=tuple(self.kinds),
            rules=self.rule_objects(),
            limit_sigma=self.limit_sigma,
            standard=standard,
            baseline=baseline,
            ewma=EwmaSettings(
                smoothing=self.ewma.smoothing,
                width=self.ewma.width,
                fast_initial_response=self.ewma.fast_initial_response,
            ),
            cusum=CusumSettings(k=self.cusum.k, h=self.cusum.h, head_start=self.cusum.head_start),
            moving_range_span=self.moving_range_span,
            exact_scale=self._exact_scale(),
        )

    def _exact_scale(self) -> ExactScale | None:
        if not self.probability_limits:
            return None
        parent = self.parent_choice().parent
        if parent is None:  # pragma: no cover - refused by load_config
            raise ConfigError("probability limits need a parent model with its parameters")
        return ExactScale(parent)

    def subgrouper(self) -> CountSubgrouper | WindowSubgrouper:
        """A fresh subgroup former for this chart."""
        s = self.subgroup
        if s.window is not None:
            return WindowSubgrouper(width=s.window, min_size=s.min_size, lateness=s.lateness, origin=s.origin)
        return CountSubgrouper(size=s.size or 1)


class TlsConfig(_Strict):
    """TLS to the broker: CA bundle, optional client certificate and key (file paths)."""

    ca: str | None = None
    cert: str | None = None
    key: str | None = None
    verify_hostname: bool = True


class BrokerConfig(_Strict):
    """Where the MQTT broker is and who we are there. Passwords never go in this file."""

    host: Annotated[str, Field(min_length=1, max_length=253)] = "127.0.0.1"
    port: Annotated[int, Field(ge=1, le=65535)] = 1883
    client_id: str = "line-monitor"
    username: str | None = None
    password_env: str | None = None
    password_file: str | None = None
    tls: TlsConfig | None = None
    qos: Literal[0, 1] = 1
    persistent_session: bool = True
    keepalive: Annotated[int, Field(ge=5, le=3600)] = 30
    reconnect_max: float = 30.0
    max_buffered_messages: Annotated[int, Field(ge=10, le=10_000_000)] = 10_000

    @field_validator("reconnect_max", mode="before")
    @classmethod
    def _duration(cls, value: object) -> object:
        return parse_duration(value)

    @field_validator("client_id")
    @classmethod
    def _client_id(cls, value: str) -> str:
        if not _CLIENT_ID.match(value):
            raise ValueError(f"a client id is 1-64 letters, digits, '.', '_' or '-', got {value!r}")
        return value


class StorageConfig(_Strict):
    """Where everything is stored: a SQLAlchemy URL (default: a SQLite file next to this file).

    ``limits_poll``: how often the daemon looks for new limits versions in the store (written
    by ``monitor baseline --save``) and puts them in force.
    """

    url: str | None = None
    limits_poll: Annotated[float, Field(ge=0.5, le=3600)] = 5.0

    @field_validator("limits_poll", mode="before")
    @classmethod
    def _poll_duration(cls, value: object) -> object:
        return parse_duration(value)


class AlertsConfig(_Strict):
    """Alert topics, repetition and severity."""

    prefix: str = "line-monitor"
    source: str | None = None
    dead_letters: bool = False
    repeat_every: float = 900.0
    clear_after: Annotated[int, Field(ge=1, le=10_000)] = 5
    false_alarm_budget: Annotated[float, Field(gt=0)] | None = 1.0
    severity: dict[str, Literal["info", "warning", "critical"]] = {}

    @field_validator("repeat_every", mode="before")
    @classmethod
    def _duration(cls, value: object) -> object:
        return parse_duration(value)

    @field_validator("prefix")
    @classmethod
    def _prefix(cls, value: str) -> str:
        if len(value) > 100 or not _PREFIX.match(value):
            raise ValueError(
                "the alert prefix is topic levels of letters, digits, '.', '_', '-' "
                f"separated by '/', without wildcards, got {value!r}"
            )
        return value


class HealthConfig(_Strict):
    """The optional HTTP endpoint for liveness, readiness and Prometheus metrics."""

    host: Annotated[str, Field(min_length=1, max_length=253)] = "127.0.0.1"
    port: Annotated[int, Field(ge=1, le=65535)] = 9410
    database_within: float = 30.0
    max_lag: float = 60.0
    heartbeat_within: float = 60.0

    @field_validator("database_within", "max_lag", "heartbeat_within", mode="before")
    @classmethod
    def _duration(cls, value: object) -> object:
        return parse_duration(value)


class Config(_Strict):
    """A whole configuration file."""

    broker: BrokerConfig = BrokerConfig()
    health: HealthConfig | None = None
    storage: StorageConfig = StorageConfig()
    alerts: AlertsConfig = AlertsConfig()
    charts: Annotated[list[ChartConfig], Field(min_length=1)]

    def chart(self, chart_id: str) -> ChartConfig:
        """The chart with this id."""
        for chart in self.charts:
            if chart.id == chart_id:
                return chart
        raise KeyError(chart_id)


# ---------------------------------------------------------------- semantic checks


@dataclass(frozen=True, slots=True)
class ConfigIssue:
    """One problem in a configuration file, located by its field path."""

    loc: Loc
    message: str
    line: int | None = None

    def path(self) -> str:
        """Field path in the dotted form ``charts[0].ewma.lambda``."""
        out = ""
        for part in self.loc:
            out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
        return out or "(top level)"


class ConfigProblems(ConfigError):
    """A configuration file has problems; the message lists each as file:line: field: text."""

    def __init__(self, source: str, issues: Sequence[ConfigIssue]) -> None:
        self.source = source
        self.issues = tuple(issues)
        lines = []
        for issue in self.issues:
            where = f"{source}:{issue.line}" if issue.line is not None else source
            lines.append(f"{where}: {issue.path()}: {issue.message}")
        super().__init__("\n".join(lines))


_RULE_DEFAULTS: dict[RuleId, Rule] = {
    RuleId.BEYOND_LIMITS: Rule.beyond_limits(),
    RuleId.OUTER_ZONE_CLUSTER: Rule.outer_zone_cluster(),
    RuleId.MIDDLE_ZONE_CLUSTER: Rule.middle_zone_cluster(),
    RuleId.SAME_SIDE_RUN: Rule.same_side_run(),
    RuleId.STEADY_TREND: Rule.steady_trend(),
    RuleId.ALTERNATING_RUN: Rule.alternating_run(),
    RuleId.HUGGING_CENTER: Rule.hugging_center(),
    RuleId.AVOIDING_CENTER: Rule.avoiding_center(),
}
_RULE_NAMES = ", ".join(r.value for r in RuleId)
_PRESET_NAMES = ", ".join(sorted(PRESETS))


def _rule(name: str, params: RuleParams | None, loc: Loc) -> tuple[Rule | None, list[ConfigIssue]]:
    try:
        rule_id = RuleId(name)
    except ValueError:
        return None, [ConfigIssue(loc, f"unknown rule {name!r}; allowed: {_RULE_NAMES}")]
    base = _RULE_DEFAULTS[rule_id]
    if params is None:
        return base, []
    if params.window is not None and rule_id not in (
        RuleId.OUTER_ZONE_CLUSTER,
        RuleId.MIDDLE_ZONE_CLUSTER,
    ):
        return None, [ConfigIssue((*loc, "window"), f"{name} takes no window; use length")]
    length = params.window or params.length or base.length
    count = params.count or (base.count if rule_id in _CLUSTER_IDS else length)
    try:
        return Rule(rule_id, length=length, count=count, sigma=params.sigma or base.sigma), []
    except ConfigError as exc:
        return None, [ConfigIssue(loc, str(exc))]


_CLUSTER_IDS = (RuleId.OUTER_ZONE_CLUSTER, RuleId.MIDDLE_ZONE_CLUSTER)


def _rules(value: str | list[RuleEntry], loc: Loc) -> tuple[tuple[Rule, ...], list[ConfigIssue]]:
    if isinstance(value, str):
        if value in PRESETS:
            return PRESETS[value], []
        return (), [
            ConfigIssue(loc, f"unknown rule set {value!r}; allowed: {_PRESET_NAMES}, or a list of rules")
        ]
    rules: list[Rule] = []
    issues: list[ConfigIssue] = []
    seen: set[RuleId] = set()
    for i, entry in enumerate(value):
        if isinstance(entry, str):
            rule, found = _rule(entry, None, (*loc, i))
        elif len(entry) != 1:
            rule, found = (
                None,
                [ConfigIssue((*loc, i), "a rule entry is a name or {name: {parameters}}")],
            )
        else:
            ((name, params),) = entry.items()
            rule, found = _rule(name, params, (*loc, i, name))
        issues.extend(found)
        if rule is not None:
            if rule.id in seen:
                issues.append(ConfigIssue((*loc, i), f"rule {rule.id.value!r} is listed twice"))
            seen.add(rule.id)
            rules.append(rule)
    if not value:
        issues.append(ConfigIssue(loc, f"give at least one rule, or a rule set: {_PRESET_NAMES}"))
    return tuple(rules), issues


def _chart_issues(chart: ChartConfig, i: int) -> list[ConfigIssue]:
    loc: Loc = ("charts", i)
    issues: list[ConfigIssue] = []
    kinds = chart.kinds
    sub = chart.subgroup
    limits = chart.limits
    if (sub.size is None) == (sub.window is None):
        issues.append(ConfigIssue((*loc, "subgroup"), "give either size (readings) or window (a duration)"))
    if sub.window is not None and sub.window <= 0:
        issues.append(ConfigIssue((*loc, "subgroup", "window"), "the window must be longer than 0 s"))
    smallest = sub.size if sub.size is not None else sub.min_size
    largest = sub.size
    attribute = [k for k in kinds if k in (ChartKind.P, ChartKind.U)]
    if len(set(kinds)) != len(kinds):
        issues.append(ConfigIssue((*loc, "kinds"), "a chart kind is listed twice"))
    if attribute and len(kinds) > 1:
        issues.append(
            ConfigIssue((*loc, "kinds"), "p and u charts stand alone: list one of them and no other kind")
        )
    size_field = "size" if sub.size is not None else "min_size"
    for kind in kinds:
        if kind in (ChartKind.XBAR_R, ChartKind.XBAR_S) and smallest < 2:
            issues.append(
                ConfigIssue(
                    (*loc, "subgroup", size_field),
                    f"{kind.value} needs subgroups of at least 2 readings; "
                    "use individuals_mr for single readings",
                )
            )
        if kind is ChartKind.INDIVIDUALS and (largest != 1):
            issues.append(
                ConfigIssue(
                    (*loc, "subgroup", "size"),
                    "individuals_mr needs subgroup size 1 (one reading per point)",
                )
            )
    if limits.baseline is not None:
        given = [f for f in ("mean", "sigma", "proportion", "rate") if getattr(limits, f) is not None]
        if given:
            issues.append(
                ConfigIssue((*loc, "limits", given[0]), "give standard values or a baseline, not both")
            )
    elif attribute:
        need = "proportion" if attribute[0] is ChartKind.P else "rate"
        if getattr(limits, need) is None:
            issues.append(
                ConfigIssue(
                    (*loc, "limits"),
                    f"a {attribute[0].value} chart needs limits.{need} or limits.baseline",
                )
            )
    elif limits.mean is None or limits.sigma is None:
        missing = "mean" if limits.mean is None else "sigma"
        issues.append(
            ConfigIssue(
                (*loc, "limits"),
                f"give limits.mean and limits.sigma, or limits.baseline (missing {missing})",
            )
        )
    topic_names = set(_PLACEHOLDER.findall(chart.topic or ""))
    missing_names = [name for name in chart.placeholders if name not in topic_names]
    if missing_names:
        issues.append(
            ConfigIssue(
                (*loc, "id"),
                f"placeholder {{{missing_names[0]}}} of the chart id is not a level of its topic "
                f"{chart.topic!r}; name the topic level the same way",
            )
        )
    if chart.cusum.head_start >= chart.cusum.h:
        issues.append(
            ConfigIssue((*loc, "cusum", "head_start"), f"head_start must be below h ({chart.cusum.h})")
        )
    _, rule_issues = _rules(chart.rules, (*loc, "rules"))
    issues.extend(rule_issues)
    if chart.probability_limits:
        if not {ChartKind.XBAR_R, ChartKind.XBAR_S, ChartKind.INDIVIDUALS} & set(kinds):
            issues.append(
                ConfigIssue(
                    (*loc, "probability_limits"),
                    "probability limits apply to the mean and individuals panels: "
                    "add xbar_r, xbar_s or individuals_mr to kinds",
                )
            )
        if chart.parent.strip().lower() == "normal":
            issues.append(
                ConfigIssue(
                    (*loc, "probability_limits"),
                    "probability limits need a parent model other than normal, with its parameters "
                    "(for example parent: gamma:shape=2,scale=1.5); under the normal model they are "
                    "the usual limits",
                )
            )
    if chart.parent.strip().lower() != "normal":
        if attribute:
            issues.append(
                ConfigIssue(
                    (*loc, "parent"),
                    "a parent model describes measured readings; p and u charts count events "
                    "(leave parent out or set it to normal)",
                )
            )
        else:
            try:
                choice = chart.parent_choice()
            except ConfigError as exc:
                issues.append(ConfigIssue((*loc, "parent"), str(exc)))
            else:
                if chart.probability_limits and choice.mode != "fixed":
                    issues.append(
                        ConfigIssue(
                            (*loc, "probability_limits"),
                            "probability limits need the parent model with its parameters "
                            "(for example parent: gamma:shape=2,scale=1.5); monitor baseline "
                            "prints the model fitted to good history",
                        )
                    )
                if choice.mode == "fit" and limits.baseline is None:
                    issues.append(
                        ConfigIssue(
                            (*loc, "parent"),
                            f"parent {chart.parent!r} is fitted to the Phase I baseline readings: set "
                            "limits.baseline, or give the model with its parameters "
                            "(for example gamma:shape=2,scale=1.5)",
                        )
                    )
    return issues


def _semantic_issues(config: Config) -> list[ConfigIssue]:
    known_rules = {r.value for r in RuleId}
    issues = [
        ConfigIssue(("alerts", "severity", rule), f"unknown rule {rule!r}; allowed: {_RULE_NAMES}")
        for rule in config.alerts.severity
        if rule not in known_rules
    ]
    own = f"{config.alerts.prefix}/#"
    for i, chart in enumerate(config.charts):
        if chart.topic and overlaps(_PLACEHOLDER.sub("+", chart.topic), own):
            issues.append(
                ConfigIssue(
                    ("charts", i, "topic"),
                    f"this topic filter also takes the monitor's own messages under "
                    f"'{config.alerts.prefix}/'; narrow it or choose another alerts.prefix",
                )
            )
    broker = config.broker
    if broker.password_env and broker.password_file:
        issues.append(
            ConfigIssue(("broker", "password_file"), "give password_env or password_file, not both")
        )
    seen: dict[str, int] = {}
    for i, chart in enumerate(config.charts):
        if chart.id in seen:
            issues.append(
                ConfigIssue(
                    ("charts", i, "id"),
                    f"chart id {chart.id!r} is also used by charts[{seen[chart.id]}]",
                )
            )
        seen.setdefault(chart.id, i)
        issues.extend(_chart_issues(chart, i))
    return issues


# ---------------------------------------------------------------- loading


def _line_of(document: object, loc: Iterable[str | int]) -> int | None:
    """1-based line of the deepest part of ``loc`` found in the parsed YAML document."""
    node = document
    line: int | None = None
    for part in loc:
        if isinstance(node, CommentedMap) and part in node:
            line = int(node.lc.key(part)[0]) + 1
            node = node[part]
        elif isinstance(node, CommentedSeq) and isinstance(part, int) and 0 <= part < len(node):
            line = int(node.lc.item(part)[0]) + 1
            node = node[part]
        # parts naming a union branch or a type are skipped
    return line


def _pydantic_issues(error: ValidationError) -> list[ConfigIssue]:
    issues = []
    for item in error.errors(include_url=False):
        message = item["msg"]
        if item["type"] == "extra_forbidden" and item["loc"][-1] == "password":
            message = (
                "passwords never go in the configuration file; name an environment variable "
                "with password_env or a file with password_file"
            )
        elif item["type"] == "extra_forbidden":
            message = "unknown field" + _suggestion(str(item["loc"][-1]))
        elif item["type"] == "missing":
            message = "required field is missing"
        elif "input" in item and not isinstance(item["input"], dict | list):
            message = f"{message} (got {item['input']!r})"
        loc = tuple(p for p in item["loc"] if isinstance(p, int) or not _is_union_tag(p))
        issues.append(ConfigIssue(loc, message))
    return issues


def _known_keys() -> set[str]:
    keys: set[str] = set()
    models: list[type[BaseModel]] = [
        BrokerConfig,
        TlsConfig,
        StorageConfig,
        AlertsConfig,
        HealthConfig,
        PayloadConfig,
        TimestampPolicy,
        Config,
        ChartConfig,
        SubgroupConfig,
        BaselineConfig,
        LimitsConfig,
        EwmaConfig,
        CusumConfig,
        RuleParams,
    ]
    for model in models:
        for name, info in model.model_fields.items():
            keys.add(info.alias or name)
    return keys | {r.value for r in RuleId}


def _suggestion(key: str) -> str:
    close = difflib.get_close_matches(key, sorted(_known_keys()), n=1, cutoff=0.7)
    return f" (did you mean {close[0]!r}?)" if close else " (check the spelling)"


def _is_union_tag(part: str) -> bool:
    return part.startswith(("function-", "list[", "dict[", "str", "int", "float", "bool")) or "[" in part


def load_config_text(text: str, source: str = "<config>") -> Config:
    """Parse and validate configuration text; raise :class:`ConfigProblems` listing every mistake."""
    yaml = YAML(typ="rt")
    try:
        document = yaml.load(text)
    except MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = None if mark is None else mark.line + 1
        problem = (exc.problem or exc.context or "invalid YAML").strip()
        raise ConfigProblems(source, [ConfigIssue((), f"YAML: {problem}", line)]) from None
    if not isinstance(document, dict):
        raise ConfigProblems(
            source, [ConfigIssue((), "the file must hold a mapping with a 'charts' list", 1)]
        )
    try:
        config = Config.model_validate(document)
    except ValidationError as exc:
        issues = _pydantic_issues(exc)
    else:
        issues = _semantic_issues(config)
        if not issues:
            return config
    located = [ConfigIssue(i.loc, i.message, _line_of(document, i.loc)) for i in issues]
    located.sort(key=lambda issue: issue.line or 0)
    raise ConfigProblems(source, located)


def load_config(path: str | Path) -> Config:
    """Load a YAML configuration file.

    Raises:
        ConfigProblems: the file is missing, is not valid YAML, or breaks the schema; the
            message has one line per mistake: ``file:line: field: what is wrong``.
    """
    file = Path(path)
    try:
        text = file.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigProblems(str(file), [ConfigIssue((), "no such file")]) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigProblems(str(file), [ConfigIssue((), f"cannot read: {exc}")]) from None
    return load_config_text(text, str(file))


# ---------------------------------------------------------------- secrets and paths


def resolve_password(broker: BrokerConfig, environ: Mapping[str, str]) -> str | None:
    """The broker password from the named environment variable or file; None if neither is set.

    A relative ``password_file`` is looked up in ``$CREDENTIALS_DIRECTORY`` (systemd
    ``LoadCredential=``) when that is set. The password is never logged or stored.

    Raises:
        ConfigError: the variable is not set, or the file cannot be read.
    """
    if broker.password_env:
        value = environ.get(broker.password_env)
        if value is None:
            raise ConfigError(
                f"broker.password_env names {broker.password_env!r}, but that environment variable is not set"
            )
        return value
    if broker.password_file:
        path = Path(broker.password_file)
        if not path.is_absolute() and environ.get("CREDENTIALS_DIRECTORY"):
            path = Path(environ["CREDENTIALS_DIRECTORY"]) / path
        try:
            return path.read_text(encoding="utf-8").rstrip("\r\n")
        except OSError as exc:
            raise ConfigError(f"cannot read broker.password_file {str(path)!r}: {exc.strerror}") from None
    return None


def storage_url(config: Config, config_path: Path, environ: Mapping[str, str] | None = None) -> str:
    """The configured storage URL; by default a SQLite file ``monitor.db``.

    The default file goes in ``$STATE_DIRECTORY`` when that is set (systemd ``StateDirectory=``,
    where the configuration directory is read-only), otherwise next to the configuration.
    """
    if config.storage.url:
        return config.storage.url
    state_directory = (environ if environ is not None else os.environ).get("STATE_DIRECTORY")
    folder = Path(state_directory.split(":")[0]) if state_directory else config_path.parent
    return f"sqlite:///{(folder / 'monitor.db').resolve()}"
