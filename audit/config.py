"""Run configuration: column map, phase-label map, defaults and repair tolerances, read from TOML.

Example (every table optional)::

    [columns]            # our name = the name in your files (matched case-insensitively)
    case = "Participant"
    outcome = "Percent correct"

    [phases]             # phase label = baseline | treatment
    "Maint" = "treatment"
    "Probe" = "baseline"

    [defaults]           # used where a file has no such column
    outcome_scale = "percent"
    desired_direction = "increase"

    [repairs]
    session_snap_tolerance = 0.2
    percent_clip_margin = 2.0

    [analysis]
    alpha = 0.05
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Mapping

REQUIRED_COLUMNS = ("study", "case", "session", "outcome", "phase")
OPTIONAL_COLUMNS = ("condition", "design", "outcome_scale", "desired_direction", "tier", "series")
KNOWN_COLUMNS = REQUIRED_COLUMNS + OPTIONAL_COLUMNS

CONDITIONS = ("baseline", "treatment")
OUTCOME_SCALES = ("percent", "count", "rate", "duration", "rating", "other")
DIRECTIONS = ("increase", "decrease")


class ConfigError(ValueError):
    """The configuration file is unreadable or holds a value we cannot use."""


@dataclass(frozen=True)
class Repairs:
    """Tolerances of the certain digitizing repairs."""

    session_snap_tolerance: float = 0.2
    percent_clip_margin: float = 2.0


@dataclass(frozen=True)
class Limits:
    """Caps on input size (clear errors instead of exhausting memory)."""

    max_file_bytes: int = 500_000_000
    max_points_per_case: int = 10_000


@dataclass(frozen=True)
class AuditConfig:
    """Everything a run needs to know besides its input paths."""

    column_map: Mapping[str, str] = field(default_factory=dict)  # ours -> theirs (lower-cased)
    phase_map: Mapping[str, str] = field(default_factory=dict)  # label (lower-cased) -> condition
    defaults: Mapping[str, str] = field(default_factory=dict)
    repairs: Repairs = field(default_factory=Repairs)
    limits: Limits = field(default_factory=Limits)
    alpha: float = 0.05
    source: str = "built-in defaults"

    def with_alpha(self, alpha: float | None) -> "AuditConfig":
        """Return a copy with alpha replaced when given."""
        if alpha is None:
            return self
        _check_alpha(alpha, "--alpha")
        return replace(self, alpha=float(alpha))

    def as_parameters(self) -> dict[str, Any]:
        """Plain-data view for run records and content hashes."""
        return {
            "column_map": dict(sorted(self.column_map.items())),
            "phase_map": dict(sorted(self.phase_map.items())),
            "defaults": dict(sorted(self.defaults.items())),
            "session_snap_tolerance": self.repairs.session_snap_tolerance,
            "percent_clip_margin": self.repairs.percent_clip_margin,
            "alpha": self.alpha,
        }


def _check_alpha(alpha: float, where: str) -> None:
    if not (isinstance(alpha, (int, float)) and 0.0 < float(alpha) < 0.5):
        raise ConfigError(f"{where}: alpha must be a number between 0 and 0.5, got {alpha!r}")


def load_config(path: str | Path | None) -> AuditConfig:
    """Read a TOML configuration file; None gives the built-in defaults."""
    if path is None:
        return AuditConfig()
    p = Path(path)
    try:
        raw = tomllib.loads(p.read_text(encoding="utf-8-sig"))
    except FileNotFoundError:
        raise ConfigError(f"config file {p} does not exist") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(f"config file {p} is not valid TOML: {exc}") from None
    return parse_config(raw, source=str(p))


def parse_config(raw: Mapping[str, Any], source: str = "inline") -> AuditConfig:
    """Build an AuditConfig from the parsed TOML tables, checking every value."""
    allowed = {"columns", "phases", "defaults", "repairs", "analysis", "limits"}
    unknown = sorted(set(raw) - allowed)
    if unknown:
        raise ConfigError(f"{source}: unknown table(s) {unknown}; allowed: {sorted(allowed)}")

    columns = raw.get("columns", {})
    column_map: dict[str, str] = {}
    for ours, theirs in columns.items():
        if ours not in KNOWN_COLUMNS:
            raise ConfigError(
                f"{source}: [columns] key {ours!r} is not a known column; known: {', '.join(KNOWN_COLUMNS)}"
            )
        if not isinstance(theirs, str) or not theirs.strip():
            raise ConfigError(f"{source}: [columns] {ours} must name a column in your files")
        column_map[ours] = theirs.strip().lower()

    phase_map: dict[str, str] = {}
    for label, condition in raw.get("phases", {}).items():
        cond = str(condition).strip().lower()
        if cond not in CONDITIONS:
            raise ConfigError(
                f"{source}: [phases] {label!r} = {condition!r}; the value must be 'baseline' or 'treatment'"
            )
        phase_map[str(label).strip().lower()] = cond

    defaults: dict[str, str] = {}
    for key, value in raw.get("defaults", {}).items():
        if key not in ("design", "outcome_scale", "desired_direction", "series"):
            raise ConfigError(
                f"{source}: [defaults] {key!r} is not allowed; use design, outcome_scale, desired_direction or series"
            )
        value = str(value).strip()
        if key == "outcome_scale" and value.lower() not in OUTCOME_SCALES:
            raise ConfigError(f"{source}: [defaults] outcome_scale must be one of {OUTCOME_SCALES}")
        if key == "desired_direction" and value.lower() not in DIRECTIONS:
            raise ConfigError(f"{source}: [defaults] desired_direction must be one of {DIRECTIONS}")
        defaults[key] = value

    rep = raw.get("repairs", {})
    try:
        repairs = Repairs(
            session_snap_tolerance=float(rep.get("session_snap_tolerance", Repairs.session_snap_tolerance)),
            percent_clip_margin=float(rep.get("percent_clip_margin", Repairs.percent_clip_margin)),
        )
    except (TypeError, ValueError):
        raise ConfigError(f"{source}: [repairs] values must be numbers") from None
    if not 0.0 <= repairs.session_snap_tolerance < 0.5:
        raise ConfigError(f"{source}: [repairs] session_snap_tolerance must be in [0, 0.5)")
    if not 0.0 <= repairs.percent_clip_margin <= 10.0:
        raise ConfigError(f"{source}: [repairs] percent_clip_margin must be in [0, 10]")

    lim = raw.get("limits", {})
    try:
        limits = Limits(
            max_file_bytes=int(lim.get("max_file_bytes", Limits.max_file_bytes)),
            max_points_per_case=int(lim.get("max_points_per_case", Limits.max_points_per_case)),
        )
    except (TypeError, ValueError):
        raise ConfigError(f"{source}: [limits] values must be whole numbers") from None
    for name in ("max_file_bytes", "max_points_per_case"):
        if getattr(limits, name) < 1:
            raise ConfigError(f"{source}: [limits] {name} must be at least 1, got {getattr(limits, name)}")

    alpha = raw.get("analysis", {}).get("alpha", 0.05)
    _check_alpha(alpha, f"{source}: [analysis] alpha")
    return AuditConfig(
        column_map=column_map,
        phase_map=phase_map,
        defaults=defaults,
        repairs=repairs,
        limits=limits,
        alpha=float(alpha),
        source=source,
    )
