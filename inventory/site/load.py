"""The site folder: load it, check all of it once, hand plain objects to every later step.

A site folder holds ``site.toml``, ``piles.gpkg``, ``materials.csv``, optional
``base/floor.tif``, ``surveys/<YYYY-MM-DD>/`` with point clouds and ``stations.csv``,
``movements/<YYYY-MM>/`` with weighbridge, belt-scale, routing and transfer records, and
``opening.csv`` for the first period. :func:`load_site` reads and validates all of it and
either returns a :class:`Site` or raises :class:`~inventory.errors.InputErrors` listing every
problem found (not just the first). :func:`check_site` does the same without raising, for
``inventory check``. Neither writes anything.

Examples
--------
>>> from inventory.site.load import check_site
>>> report = check_site("sample_site")            # doctest: +SKIP
>>> report.ok                                      # doctest: +SKIP
True
"""

from __future__ import annotations

import json
import math
import os
import re
import warnings
from collections.abc import Collection, Mapping
from dataclasses import dataclass, field
from datetime import date, datetime, time, timezone
from functools import lru_cache
from importlib import resources
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np
import pandas as pd
import tomllib

from inventory.errors import InputErrors, InputWarning, Problem
from inventory.io.tables import is_blank, read_table, table_schema
from inventory.model.period import Period
from inventory.model.texts import DEFAULT_VERTICAL_REFERENCE
from inventory.site.extent import survey_extent_problems
from inventory.site.rules import MOVEMENT_TABLES, check_movements, check_opening

__all__ = [
    "Site",
    "SiteConfig",
    "Material",
    "Scale",
    "SurveyRef",
    "Movements",
    "CheckReport",
    "load_site",
    "check_site",
    "parse_base",
    "POINT_CLOUD_SUFFIXES",
]

#: File endings read as point clouds: LAS, LAZ (COPC files end in .copc.laz and are LAZ
#: 1.4), E57, PLY and delimited text.
POINT_CLOUD_SUFFIXES = (".las", ".laz", ".e57", ".ply", ".xyz", ".txt")
_SURVEY_DIR = re.compile(r"^\d{4}-\d{2}-\d{2}$")
_LEVEL_BASE = re.compile(r"^level:(-?\d+(\.\d+)?)$")
#: Overlap between two footprints below this many square metres is digitising noise, not an
#: overlap (a shared toe line drawn twice); common practice for vector QA at survey scale.
OVERLAP_TOLERANCE_M2 = 0.01
#: Deepest nesting of tables and arrays accepted in site.toml. The deepest the schema uses is
#: four levels (``machines.<id>.rail_origin``'s numbers); far deeper is not a site file, and
#: reading it would exhaust Python's recursion limit.
MAX_TOML_DEPTH = 16
#: What every refusal of a path outside the site folder says.
_OUTSIDE_WHY = ("inputs stay inside the site folder unless site.toml sets "
                "[paths] allow_outside = true")


# ----------------------------------------------------------------------------- plain objects
@dataclass(frozen=True)
class Material:
    """One material of the material table (``materials.csv``)."""

    name: str
    bulk_density_t_m3: float
    density_sd_t_m3: float
    moisture_pct: float
    tolerance_pct: float | None = None
    #: Stock value per tonne in the currency of ``[journal] currency`` (None = not valued).
    unit_cost: float | None = None


@dataclass(frozen=True)
class Scale:
    """One weighing instrument from ``site.toml`` ``[[scales]]``."""

    id: str
    kind: str  # "belt" | "weighbridge"
    accuracy_class: str
    direction: str | None = None  # belts: "in" feeds piles, "out" reclaims
    scale_interval_kg: float | None = None
    in_service: bool = True
    max_capacity_t: float | None = None  # weighbridges: heaviest gross it may weigh


@dataclass(frozen=True)
class GridConfig:
    cell_size_m: float = 0.5
    max_fill_distance_m: float = 3.0
    statistic: str = "mean"


@dataclass(frozen=True)
class SurveyConfig:
    default_crs: str | None = None
    pipeline: Path | None = None
    default_time: str = "12:00"
    trajectory_max_gap_s: float = 1.0
    control_model: str = "7-parameter"
    control_rms_max_m: float = 0.05


@dataclass(frozen=True)
class BaseConfig:
    floor_raster: Path | None = None
    floor_sigma_m: float = 0.03
    toe_ring_m: float = 3.0


@dataclass(frozen=True)
class UnassignedConfig:
    """``[unassigned]``: stock outside every footprint (:mod:`inventory.volume.unassigned`)."""

    min_thickness_m: float = 0.3
    min_area_m2: float = 4.0


@dataclass(frozen=True)
class ReconcileConfig:
    significance_k: float = 2.0
    default_tolerance_pct: float = 3.0
    adjust_to: str = "survey"
    duplicate_window_min: float = 10.0
    #: Adjustment policy: "all", "significant" (beyond k sigma) or "out_of_tolerance".
    adjust: str = "all"
    #: Hold an UNEXPLAINED variance (significant, out of tolerance, no explanation found).
    hold_unexplained: bool = True


@dataclass(frozen=True)
class JournalConfig:
    """The ``[journal]`` section of site.toml: codes and currency of the posting journal."""

    currency: str | None = None
    accounts: dict = field(default_factory=dict)   # material -> stock account code
    locations: dict = field(default_factory=dict)  # pile id -> storage location code


@dataclass(frozen=True)
class SiteConfig:
    """The sections of ``site.toml`` with their defaults filled in."""

    grid: GridConfig = GridConfig()
    survey: SurveyConfig = SurveyConfig()
    base: BaseConfig = BaseConfig()
    reconcile: ReconcileConfig = ReconcileConfig()
    unassigned: UnassignedConfig = UnassignedConfig()
    journal: JournalConfig = JournalConfig()
    machines: dict = field(default_factory=dict)  # id -> inventory.model.pose.Machine
    raw: dict = field(default_factory=dict, compare=False)


@dataclass
class SurveyRef:
    """One survey folder: its files, station poses and the instant it stands for."""

    date: str
    folder: Path
    files: list[Path]
    stations: pd.DataFrame | None
    instant: datetime
    extent: tuple[float, float, float, float] | None = None  # site CRS, from file headers
    point_count: int = 0
    control: Any = None  # inventory.site.control.Registration when control.csv registers the survey


@dataclass
class Movements:
    """One period's movement records, checked by :mod:`inventory.site.rules`.

    The tables are as the rules return them: times in UTC, ``net_t`` computed from gross and
    tare, every ticket's ``scale_id`` resolved, ``line`` and ``source`` on every row. Book stock
    trusts them. The site loader builds them; build your own with :meth:`checked`, which runs
    the same rules.
    """

    period: str
    weighbridge: pd.DataFrame
    belt_scales: pd.DataFrame
    routing: pd.DataFrame
    transfers: pd.DataFrame

    @classmethod
    def checked(
        cls,
        period: str,
        weighbridge: pd.DataFrame | None = None,
        belt_scales: pd.DataFrame | None = None,
        routing: pd.DataFrame | None = None,
        transfers: pd.DataFrame | None = None,
        *,
        scales: Mapping[str, Scale],
        pile_ids: Collection[str],
        materials: Collection[str],
        timezone: ZoneInfo | str | None = None,
    ) -> Movements:
        """Movements from hand-built tables, checked by the rules the site loader applies.

        Tables left out have no records. Rows without ``source`` / ``line`` columns are named
        ``<table>.csv`` line 2, 3, ... in messages. With the site's ``timezone``, a ticket or
        transfer dated outside ``period`` is an error, as in a site folder.

        Raises
        ------
        InputErrors
            Listing every problem, when any row breaks a rule. Warnings (a ticket entered
            twice with the same content) are issued as :class:`~inventory.errors.InputWarning`.
        """
        frames, problems = check_movements(
            weighbridge, belt_scales, routing, transfers, scales=scales, pile_ids=pile_ids, materials=materials,
            period=period if timezone is not None else None, timezone=timezone,
        )
        if any(p.severity == "error" for p in problems):
            raise InputErrors(problems)
        for problem in problems:
            warnings.warn(str(problem), InputWarning, stacklevel=2)
        return cls(period, **frames)

    @classmethod
    def empty(cls, period: str) -> Movements:
        """A period without records."""
        frames, _ = check_movements(scales={}, pile_ids=None, materials=None)
        return cls(period, **frames)

    @property
    def record_count(self) -> int:
        return sum(len(t) for t in (self.weighbridge, self.belt_scales, self.routing, self.transfers))


@dataclass
class Site:
    """A loaded, validated site folder."""

    root: Path
    name: str
    crs: str
    timezone: ZoneInfo
    config: SiteConfig
    scales: dict[str, Scale]
    materials: dict[str, Material]
    piles: Any  # GeoDataFrame: pile_id, material, base, density_t_m3, geometry
    surveys: dict[str, SurveyRef]
    movements: dict[str, Movements]
    opening: pd.DataFrame | None
    warnings: list[Problem] = field(default_factory=list)
    #: What the survey heights are referred to, as the outputs state it: ``site.toml``
    #: ``vertical_reference``, else the name of its ``vertical_crs``, else the default.
    vertical_reference: str = DEFAULT_VERTICAL_REFERENCE

    @property
    def periods(self) -> list[str]:
        """Periods (``YYYY-MM``) that have movement records or a survey."""
        return sorted(set(self.movements) | {d[:7] for d in self.surveys})

    def survey_for(self, period: str) -> SurveyRef | None:
        """The last survey dated inside ``period``, or None."""
        dates = [d for d in self.surveys if d.startswith(period)]
        return self.surveys[max(dates)] if dates else None

    def movements_for(self, period: str) -> Movements:
        """The period's records; empty tables when the period has none."""
        if period in self.movements:
            return self.movements[period]
        return Movements.empty(period)

    def summary(self) -> str:
        """A few lines for ``inventory check``."""
        lines = [
            f"site      {self.name} ({self.crs}, {self.timezone.key})",
            f"piles     {len(self.piles)}: " + ", ".join(
                f"{p} ({m})" for p, m in zip(self.piles["pile_id"], self.piles["material"])
            ),
            f"materials {len(self.materials)}: " + ", ".join(sorted(self.materials)),
            f"scales    {len(self.scales)}: " + ", ".join(
                f"{s.id} ({s.kind} class {s.accuracy_class})" for s in self.scales.values()
            ),
        ]
        if self.surveys:
            lines.append(f"surveys   {len(self.surveys)}:")
            for ref in self.surveys.values():
                local = ref.instant.astimezone(self.timezone).strftime("%Y-%m-%d %H:%M %Z")
                lines.append(
                    f"          {ref.date}  {len(ref.files)} file(s), {ref.point_count:,} points, at {local}"
                )
        else:
            lines.append("surveys   none")
        if self.movements:
            lines.append(f"movements {len(self.movements)} period(s):")
            for period, mv in sorted(self.movements.items()):
                lines.append(
                    f"          {period}  {len(mv.weighbridge)} tickets, {len(mv.belt_scales)} belt totals, "
                    f"{len(mv.routing)} routing windows, {len(mv.transfers)} transfers"
                )
        else:
            lines.append("movements none")
        lines.append(
            "opening   " + (f"{len(self.opening)} balance(s) in opening.csv" if self.opening is not None else "none (from the ledger)")
        )
        return "\n".join(lines)


@dataclass
class CheckReport:
    """What ``inventory check`` found: the site (when it loaded) and every problem."""

    root: Path
    site: Site | None
    problems: list[Problem]
    #: the problems found in each period's movement tables (also in ``problems``)
    by_period: dict[str, list[Problem]] = field(default_factory=dict)

    @property
    def errors(self) -> list[Problem]:
        return [p for p in self.problems if p.severity == "error"]

    @property
    def warnings(self) -> list[Problem]:
        return [p for p in self.problems if p.severity == "warning"]

    @property
    def ok(self) -> bool:
        return not self.errors


# ----------------------------------------------------------------------------- entry points
def load_site(path: str | Path, period: str | None = None) -> Site:
    """Load and validate a site folder.

    ``period`` (``YYYY-MM``, for a close): warnings about other periods' movement tables are
    kept in ``Site.warnings`` but not issued.

    Raises
    ------
    InputErrors
        When anything is wrong; ``.problems`` lists every problem with file, line or feature
        and field. Warnings (usable but suspicious input) are issued as
        :class:`~inventory.errors.InputWarning` and kept in ``Site.warnings``.
    """
    report = check_site(path)
    if not report.ok:
        raise InputErrors(report.problems)
    assert report.site is not None  # ok implies loaded; internal invariant, not user input
    others = {id(p) for month, found in report.by_period.items() if period is not None and month != period
              for p in found}
    for problem in report.warnings:
        if id(problem) not in others:
            warnings.warn(str(problem), InputWarning, stacklevel=2)
    return report.site


def check_site(path: str | Path) -> CheckReport:
    """Validate a site folder and return every problem found. Never writes anything."""
    root = Path(path)
    loader = _Loader(root)
    site = loader.load()
    return CheckReport(root, site if not any(p.severity == "error" for p in loader.problems) else None, loader.problems,
                       loader.by_period)


def parse_base(text: str) -> tuple[str, float | None]:
    """Split a pile's ``base`` into method and level.

    >>> parse_base("level:12.5")
    ('level', 12.5)
    >>> parse_base("toe")
    ('toe', None)
    """
    if not isinstance(text, str):
        raise ValueError(f"{text!r} is not floor, toe or level:<z in metres>")
    value = text.strip()
    if value in ("floor", "toe"):
        return value, None
    match = _LEVEL_BASE.match(value)
    if match:
        return "level", float(match.group(1))
    raise ValueError(f"'{text}' is not floor, toe or level:<z in metres>")


# ----------------------------------------------------------------------------- the loader
@lru_cache(maxsize=None)
def _site_schema() -> dict:
    text = resources.files("inventory").joinpath("site", "schemas", "site.schema.json").read_text("utf-8")
    return json.loads(text)


class _Loader:
    """Collects problems while reading one site folder; see :func:`check_site`."""

    def __init__(self, root: Path) -> None:
        # Every path is built on the absolute folder, so a path from site.toml resolves against
        # the site folder whether the folder was given relative or absolute; messages show
        # paths as the folder was given.
        self.given = root
        self.root = root.absolute()
        self.problems: list[Problem] = []
        self.allow_outside = False
        self.refused: set[tuple] = set()  # site.toml keys the schema refused
        self.toml_text: str | None = None  # site.toml as read, to find a key's line
        self.by_period: dict[str, list[Problem]] = {}

    # -- helpers
    def rel(self, path: Path) -> str:
        try:
            path = self.given / path.relative_to(self.root)
        except ValueError:
            return str(path)
        try:
            return str(path.relative_to(self.given.parent)) if self.given.parent != Path(".") else str(path)
        except ValueError:
            return str(path)

    def outside(self, path: Path) -> bool:
        """True when ``path`` (links followed) lies outside the site folder and site.toml does
        not allow that."""
        if self.allow_outside:
            return False
        return not path.resolve().is_relative_to(self.root.resolve())

    def error(self, path: Path | str, where: Any, fieldname: str | None, why: str) -> None:
        shown = self.rel(path) if isinstance(path, Path) else path
        self.problems.append(Problem(shown, self._toml_where(path, where, fieldname), fieldname, why))

    def _toml_where(self, path: Path | str, where: Any, fieldname: str | None) -> Any:
        """The line of a site.toml key named by ``fieldname`` when no line is given."""
        if where is not None or not fieldname or not self.toml_text:
            return where
        if not isinstance(path, Path) or path.absolute() != self.root / "site.toml":
            return where
        return _toml_line(self.toml_text, fieldname)

    def errors_in(self, path: Path, fieldname: str | None = None) -> list[Problem]:
        """The errors reported so far on ``path`` (on its ``fieldname`` when given)."""
        shown = self.rel(path)
        return [p for p in self.problems if p.severity == "error" and p.path == shown
                and (fieldname is None or p.field == fieldname)]

    def warn(self, path: Path | str, where: Any, fieldname: str | None, why: str) -> None:
        shown = self.rel(path) if isinstance(path, Path) else path
        self.problems.append(Problem(shown, self._toml_where(path, where, fieldname), fieldname, why, "warning"))

    def table(self, path: Path, name: str, *, empty_ok: bool = False) -> pd.DataFrame:
        schema = table_schema(name)
        if self.outside(path):
            # refused before reading, so that no line of the linked file shows in a message
            self.error(path, None, None, f"links to a file outside the site folder (refused; {_OUTSIDE_WHY})")
            return pd.DataFrame({c: pd.Series(dtype=object) for c in [*schema.names, "line", "source"]})
        return read_table(path, schema, self.problems, display=self.rel(path), empty_ok=empty_ok)

    # -- the whole folder
    def load(self) -> Site | None:
        if not self.root.exists():
            self.error(str(self.given), None, None, "the site folder does not exist")
            return None
        if not self.root.is_dir():
            self.error(str(self.given), None, None, "is a file, not a site folder (give the folder that holds site.toml)")
            return None
        raw = self._read_toml()
        if raw is None:
            return None
        self.allow_outside = self._setting(raw, "paths", "allow_outside", False) is True
        config = self._config(raw)
        crs = self._site_crs(raw)
        tz = self._timezone(raw)
        scales = self._scales(raw)
        materials, material_names = self._materials()
        piles = self._piles(material_names, crs)
        pile_ids = set(piles["pile_id"]) if piles is not None else set()
        ids_known = piles is not None and not self.errors_in(self.root / "piles.gpkg", "pile_id")
        if not ids_known:
            # an id refused there (missing, a number) would make every row naming it 'unknown':
            # the tables' pile ids are checked once the register is right
            pile_ids = set()
        opening = self._opening(pile_ids, raw)
        self._journal_codes(config.journal, material_names, pile_ids if ids_known else None)
        if config.journal.currency is None and materials:
            costed = sorted(m for m, mat in materials.items() if mat.unit_cost is not None)
            if costed:
                self.warn(self.root / "materials.csv", 1, "unit_cost",
                          f"{len(costed)} material(s) have a unit cost but site.toml has no [journal] currency: "
                          "the journal's values carry no currency")
        if piles is not None:
            self._small_footprints(piles, config.grid.cell_size_m)
            if config.base.floor_raster is not None and crs is not None:
                self._floor_under_piles(config.base.floor_raster, piles, crs)
        movements = self._all_movements(pile_ids, material_names, scales, tz)
        if piles is not None and ids_known:
            self._tickets_against_piles(movements, dict(zip(piles["pile_id"], piles["material"])))
        surveys = self._surveys(crs, config, tz) if crs else {}
        if opening is not None and tz is not None and surveys and not self._ledger_named(raw):
            self._opening_months(opening, surveys, tz)
        if piles is not None and surveys:
            self._piles_against_surveys(piles, surveys)
            self.problems += survey_extent_problems(surveys, piles, config.grid.cell_size_m, self.rel)
        if piles is None or crs is None or tz is None:
            return None
        return Site(
            root=self.root,
            name=str(raw.get("name", "")),
            crs=crs,
            timezone=tz,
            config=config,
            scales=scales,
            materials=materials,
            piles=piles,
            surveys=surveys,
            movements=movements,
            opening=opening,
            warnings=[p for p in self.problems if p.severity == "warning"],
            vertical_reference=self._vertical_reference(raw),
        )

    def _read_toml(self) -> dict | None:
        path = self.root / "site.toml"
        if not path.is_file():
            self.error(path, None, None, _not_a_file(path))
            return None
        try:
            text = path.read_bytes().decode("utf-8-sig")
            raw = tomllib.loads(text)
            self.toml_text = text
        except UnicodeDecodeError:
            self.error(path, None, None, "not UTF-8 text")
            return None
        except OSError as err:  # no read permission, a read error of the disk
            self.error(path, None, None, f"cannot be read ({err.strerror or err})")
            return None
        except RecursionError:
            self.error(path, None, None, f"tables or arrays nested too deeply to read (at most {MAX_TOML_DEPTH} levels)")
            return None
        except tomllib.TOMLDecodeError as err:
            line = getattr(err, "lineno", None)
            match = re.search(r"line (\d+)", str(err))
            if line is None and match:
                line = int(match.group(1))
            self.error(path, line, None, f"not valid TOML: {err}")
            return None
        depth, key = _nesting(raw)
        if depth > MAX_TOML_DEPTH:
            self.error(path, None, key, f"tables or arrays nested {depth} levels deep (at most {MAX_TOML_DEPTH})")
            return None
        import jsonschema

        validator = jsonschema.Draft202012Validator(_site_schema())
        bad = False
        non_finite = _non_finite(raw)
        for err in sorted(validator.iter_errors(raw), key=lambda e: [str(p) for p in e.absolute_path]):
            if tuple(err.absolute_path) in {keys for keys, _ in non_finite}:
                continue   # reported once below, as not finite
            where = ".".join(str(p) for p in err.absolute_path) or None
            if err.validator not in ("required", "additionalProperties"):
                self.refused.add(tuple(err.absolute_path))
            if err.validator == "required":
                missing = re.findall(r"'([^']+)' is a required property", err.message)
                name = ".".join(filter(None, [where, missing[0] if missing else None]))
                self.error(path, None, name, "required key is missing")
            elif err.validator == "additionalProperties":
                extra = re.findall(r"'([^']+)'", err.message)
                name = ".".join(filter(None, [where, extra[0] if extra else None]))
                self.error(path, None, name, "unknown key")
            elif err.validator == "pattern" and isinstance(err.schema, dict) and err.schema.get("errorMessage"):
                # the schema's own words instead of a regular expression
                self.error(path, None, where, f"{err.instance!r} {err.schema['errorMessage']}")
            else:
                self.error(path, None, where, err.message)
            bad = True
        for keys, value in non_finite:
            # TOML allows nan and inf; no setting of the site means either (the schema's bounds
            # cannot catch them: every comparison with nan is false)
            self.refused.add(keys)
            self.error(path, None, ".".join(map(str, keys)), f"{value} is not a finite number")
            bad = True
        return None if bad and any(k not in raw for k in ("name", "crs", "timezone")) else raw

    def _setting(self, raw: dict, section: str, key: str, default: Any) -> Any:
        """``raw[section][key]``, or ``default`` when it is absent or the schema refused it
        (the refusal is reported; a refused value is never converted)."""
        table = raw.get(section)
        if not isinstance(table, dict) or key not in table:
            return default
        if any(p[:2] in ((section,), (section, key)) for p in self.refused):
            return default
        return table[key]

    def _config(self, raw: dict) -> SiteConfig:
        def get(section: str, key: str, default: Any) -> Any:
            return self._setting(raw, section, key, default)

        return SiteConfig(
            grid=GridConfig(
                cell_size_m=float(get("grid", "cell_size_m", 0.5)),
                max_fill_distance_m=float(get("grid", "max_fill_distance_m", 3.0)),
                statistic=str(get("grid", "statistic", "mean")),
            ),
            survey=SurveyConfig(
                default_crs=get("survey", "default_crs", None),
                pipeline=self._config_path(get("survey", "pipeline", None), "survey.pipeline"),
                default_time=str(get("survey", "default_time", "12:00")),
                trajectory_max_gap_s=float(get("survey", "trajectory_max_gap_s", 1.0)),
                control_model=str(get("survey", "control_model", "7-parameter")),
                control_rms_max_m=float(get("survey", "control_rms_max_m", 0.05)),
            ),
            base=BaseConfig(
                floor_raster=self._floor_raster(get("base", "floor_raster", None)),
                floor_sigma_m=float(get("base", "floor_sigma_m", 0.03)),
                toe_ring_m=float(get("base", "toe_ring_m", 3.0)),
            ),
            reconcile=ReconcileConfig(
                significance_k=float(get("reconcile", "significance_k", 2.0)),
                default_tolerance_pct=float(get("reconcile", "default_tolerance_pct", 3.0)),
                adjust_to=str(get("reconcile", "adjust_to", "survey")),
                duplicate_window_min=float(get("reconcile", "duplicate_window_min", 10.0)),
                adjust=str(get("reconcile", "adjust", "all")),
                hold_unexplained=bool(get("reconcile", "hold_unexplained", True)),
            ),
            journal=JournalConfig(
                currency=get("journal", "currency", None),
                accounts={str(k): str(v) for k, v in (get("journal", "accounts", None) or {}).items()},
                locations={str(k): str(v) for k, v in (get("journal", "locations", None) or {}).items()},
            ),
            unassigned=UnassignedConfig(
                min_thickness_m=float(get("unassigned", "min_thickness_m", 0.3)),
                min_area_m2=float(get("unassigned", "min_area_m2", 4.0)),
            ),
            machines=self._machines(raw) if not any(p[:1] == ("machines",) for p in self.refused) else {},
            raw=raw,
        )

    def _journal_codes(self, journal: JournalConfig, materials: Collection[str], piles: Collection[str] | None) -> None:
        """A code mapped for a material or pile the site does not have is a warning: a typo
        leaves the real one's journal lines without a code, but the figures stand."""
        toml = self.root / "site.toml"
        for name in sorted(set(journal.accounts) - set(materials)):
            self.warn(toml, None, f"journal.accounts.{name}",
                      f"unknown material {name!r} (not in materials.csv): its account code is not used")
        if piles is not None:
            for pid in sorted(set(journal.locations) - set(piles)):
                self.warn(toml, None, f"journal.locations.{pid}",
                          f"unknown pile {pid!r} (not in piles.gpkg): its location code is not used")

    def _floor_raster(self, text: str | None) -> Path | None:
        """The floor raster site.toml names (it must exist), else ``base/floor.tif`` if present."""
        if text is not None:
            path = self._config_path(text, "base.floor_raster")
        else:
            default = "base/floor.tif"
            path = self._config_path(default, "base.floor_raster") if (self.root / default).is_file() else None
        if path is not None and not self._raster_readable(path, "floor_raster"):
            return None
        return path

    def _raster_readable(self, path: Path, fieldname: str) -> bool:
        """Whether every block of the raster's first band reads (reports why not): a raster
        cut short opens, and fails only where its missing tiles are read."""
        import rasterio
        from rasterio.errors import RasterioError

        where = None
        try:
            with rasterio.open(path) as src:
                if src.count < 1:
                    self.error(path, None, fieldname, "the raster has no band")
                    return False
                for (row, col), window in src.block_windows(1):
                    where = f"block {row},{col} (rows {window.row_off}-{window.row_off + window.height - 1})"
                    src.read(1, window=window)
        except (RasterioError, OSError) as err:
            cause = err.__cause__ or err.__context__
            detail = str(cause if where is not None and cause is not None else err)
            detail = detail.replace(str(path), path.name)
            if where is None:
                self.error(path, None, fieldname, f"cannot be opened as a GeoTIFF ({detail})")
            else:
                self.error(path, where, fieldname, f"cut short or damaged: cannot be read ({detail})")
            return False
        return True

    def _config_path(self, text: str | None, key: str) -> Path | None:
        """A file named in site.toml, relative to the site folder (or absolute): it must exist,
        and lie inside the site folder unless ``[paths] allow_outside = true``."""
        if text is None:
            return None
        toml = self.root / "site.toml"
        path = self.root / Path(text)  # an absolute text replaces the folder
        if self.outside(path):
            self.error(toml, None, key, f"{text!r} is outside the site folder (refused; {_OUTSIDE_WHY})")
            return None
        if not _is_file(path):
            self.error(toml, None, key, f"no file {text!r} (paths are relative to the site folder)")
            return None
        real = path.resolve()
        if real.is_relative_to(self.root.resolve()) and not path.is_relative_to(self.root):
            path = self.root / real.relative_to(self.root.resolve())  # inside, named absolutely
        return path

    def _machines(self, raw: dict) -> dict:
        from inventory.errors import InputError
        from inventory.site.trajectory import machines_from_config

        try:
            return machines_from_config(raw.get("machines"), self.rel(self.root / "site.toml"))
        except InputError as err:
            self.problems.append(err.problem)
            return {}

    def _site_crs(self, raw: dict) -> str | None:
        from pyproj import CRS
        from pyproj.exceptions import CRSError as ProjCRSError

        text = raw.get("crs")
        path = self.root / "site.toml"
        if not isinstance(text, str):
            return None
        try:
            crs = CRS.from_user_input(text)
        except ProjCRSError as err:
            self.error(path, None, "crs", f"unknown CRS {text!r} ({err})")
            return None
        if not crs.is_projected:
            self.error(path, None, "crs", f"{text} ({crs.name}) is not a projected CRS; volumes need metres on the ground")
            return None
        unit = crs.axis_info[0].unit_name if crs.axis_info else ""
        if crs.axis_info and abs(crs.axis_info[0].unit_conversion_factor - 1.0) > 1e-12:
            self.error(path, None, "crs", f"{text} ({crs.name}) has axis unit {unit}; use a CRS in metres")
            return None
        return text

    def _vertical_reference(self, raw: dict) -> str:
        """``vertical_reference`` as given; else ``"<name> (EPSG:n), metres"`` from a
        ``vertical_crs`` that is a vertical CRS in metres; else the default."""
        def top(key: str) -> Any:  # a value the schema refused is reported, never used
            return None if (key,) in self.refused else raw.get(key)

        text = top("vertical_reference")
        if isinstance(text, str) and text.strip():
            return " ".join(text.split())
        code = top("vertical_crs")
        if not isinstance(code, str):
            return DEFAULT_VERTICAL_REFERENCE
        from pyproj import CRS
        from pyproj.exceptions import CRSError as ProjCRSError

        path = self.root / "site.toml"
        try:
            crs = CRS.from_user_input(code)
        except ProjCRSError as err:
            self.error(path, None, "vertical_crs", f"unknown CRS {code!r} ({err})")
            return DEFAULT_VERTICAL_REFERENCE
        if not crs.is_vertical:
            self.error(path, None, "vertical_crs", f"{code} ({crs.name}) is not a vertical CRS")
            return DEFAULT_VERTICAL_REFERENCE
        if crs.axis_info and abs(crs.axis_info[0].unit_conversion_factor - 1.0) > 1e-12:
            self.error(path, None, "vertical_crs", f"{code} ({crs.name}) has heights in "
                       f"{crs.axis_info[0].unit_name}; use a vertical CRS in metres")
            return DEFAULT_VERTICAL_REFERENCE
        return f"{crs.name} ({code}), metres"

    def _timezone(self, raw: dict) -> ZoneInfo | None:
        name = raw.get("timezone")
        if not isinstance(name, str):
            return None
        try:
            return ZoneInfo(name)
        except (ZoneInfoNotFoundError, ValueError):
            self.error(self.root / "site.toml", None, "timezone", f"unknown IANA time zone {name!r}")
            return None

    def _scales(self, raw: dict) -> dict[str, Scale]:
        path = self.root / "site.toml"
        scales: dict[str, Scale] = {}
        items = raw.get("scales")
        if not isinstance(items, list) or ("scales",) in self.refused:
            return scales
        for i, given in enumerate(items):
            if not isinstance(given, dict) or not isinstance(given.get("id"), str):
                continue  # reported by the schema
            # a key the schema refused is left out, never converted
            item = {k: v for k, v in given.items() if ("scales", i, k) not in self.refused}
            where = f"scales[{i}]"
            if item["id"] in scales:
                self.error(path, None, f"{where}.id", f"scale id {item['id']!r} is used twice")
                continue
            kind = item.get("kind")
            if kind == "belt" and item.get("direction") not in ("in", "out"):
                self.error(path, None, f"{where}.direction", "a belt scale needs direction = \"in\" or \"out\"")
            if kind == "belt" and item.get("accuracy_class") not in ("0.2", "0.5", "1", "2"):
                self.error(path, None, f"{where}.accuracy_class", "belt weighers have OIML R 50 classes 0.2, 0.5, 1 or 2")
            if kind == "weighbridge":
                if item.get("accuracy_class") not in ("I", "II", "III", "IIII"):
                    self.error(path, None, f"{where}.accuracy_class", "weighbridges have OIML R 76 classes I, II, III or IIII")
                if "scale_interval_kg" not in given:
                    self.error(path, None, f"{where}.scale_interval_kg", "a weighbridge needs its verification scale interval e")
            scales[item["id"]] = Scale(
                id=item["id"],
                kind=kind,
                accuracy_class=str(item.get("accuracy_class")),
                direction=item.get("direction"),
                scale_interval_kg=item.get("scale_interval_kg"),
                in_service=bool(item.get("in_service", True)),
                max_capacity_t=item.get("max_capacity_t"),
            )
        return scales

    def _materials(self) -> tuple[dict[str, Material], set[str]]:
        """The usable materials, and the names of every material row in materials.csv (a
        refused row is reported once, not again as an unknown material wherever it is used)."""
        path = self.root / "materials.csv"
        if not path.is_file():
            self.error(path, None, None, _not_a_file(path))
            return {}, set()
        errors_before = len(self.errors_in(path))
        frame = self.table(path, "materials")
        names = set(frame["material"])
        if len(self.errors_in(path)) > errors_before:
            names |= _column_values(path, "material")
        # a sigma as large as the density itself says the density could be nothing: the
        # columns swapped, or the sigma keyed in kg/m3
        wide = frame["density_sd_t_m3"].notna() & (frame["density_sd_t_m3"] >= frame["bulk_density_t_m3"])
        for row in frame[wide].itertuples():
            self.error(path, int(row.line), "density_sd_t_m3",
                       f"{row.density_sd_t_m3:g} t/m3 is not below the bulk density {row.bulk_density_t_m3:g} t/m3 "
                       "(columns swapped? a density's one-sigma is a few per cent of it)")
        frame = frame[~wide]
        materials = {
            row.material: Material(
                row.material,
                row.bulk_density_t_m3,
                row.density_sd_t_m3,
                row.moisture_pct,
                None if pd.isna(row.tolerance_pct) else float(row.tolerance_pct),
                None if pd.isna(getattr(row, "unit_cost", None)) else float(row.unit_cost),
            )
            for row in frame.itertuples()
        }
        return materials, names

    def _piles(self, materials: Collection[str], site_crs: str | None):
        import geopandas as gpd
        import pyogrio
        import shapely

        path = self.root / "piles.gpkg"
        if not path.is_file():
            self.error(path, None, None, _not_a_file(path))
            return None
        if self.outside(path):
            self.error(path, None, None, f"links to a file outside the site folder (refused; {_OUTSIDE_WHY})")
            return None
        try:
            layers = [name for name, _ in pyogrio.list_layers(path)]
        except Exception as err:  # pyogrio raises its own DataSourceError family; keep the cause
            self.error(path, None, None, f"not a readable GeoPackage ({err})")
            return None
        if "piles" not in layers:
            self.error(path, None, None, f"no layer 'piles' (found: {', '.join(layers) or 'none'})")
            return None
        frame = gpd.read_file(path, layer="piles", engine="pyogrio", fid_as_index=True)
        if not isinstance(frame, gpd.GeoDataFrame):   # an attribute table without geometry
            self.error(path, "layer piles", "geometry", "the layer has no geometry column (footprints are polygons)")
            return None
        has_z = shapely.has_z(frame.geometry.values)
        if has_z.any():
            # a footprint is drawn on the map: the heights of its corners measure nothing (a
            # pile's base is its 'base' field); without them every step sees the same polygon
            frame = frame.set_geometry(shapely.force_2d(frame.geometry.values), crs=frame.crs)
            self.warn(path, "layer piles", "geometry",
                      f"{int(has_z.sum())} footprint(s) carry heights (Z); only their x and y are used")
        for column in ("pile_id", "material", "base"):
            if column not in frame.columns:
                self.error(path, "layer piles", column, "required field is missing")
        if any(c not in frame.columns for c in ("pile_id", "material", "base")):
            return None
        if "density_t_m3" not in frame.columns:
            frame["density_t_m3"] = np.nan
        if frame.crs is None:
            self.error(path, "layer piles", None, "the layer has no CRS")
        elif site_crs is not None:
            frame = self._piles_in_site_crs(frame, path, site_crs)
            if frame is None:
                return None
        display = self.rel(path)
        good = np.ones(len(frame), dtype=bool)
        seen: dict[str, int] = {}
        for i, (fid, row) in enumerate(frame.iterrows()):
            pid = row["pile_id"]
            where = f"feature {fid}" + (f" (pile {pid})" if isinstance(pid, str) and pid else "")
            if is_blank(pid):
                self.error(display, where, "pile_id", "value is missing")
                good[i] = False
                continue
            if not isinstance(pid, str):
                # the tables hold pile ids as text: a number here would never match them
                self.error(display, where, "pile_id",
                           f"{pid} is a number; the field must be text (String), as the tables' pile ids are")
                good[i] = False
                continue
            if pid != pid.strip():
                # the tables' cells are read without their surrounding spaces: so is the pile id
                self.warn(display, where, "pile_id", f"pile id {pid!r} has spaces around it; read as {pid.strip()!r}")
                pid = pid.strip()
                frame.at[fid, "pile_id"] = pid
            if pid in seen:
                self.error(display, where, "pile_id", f"pile id {pid!r} repeats feature {seen[pid]}")
                good[i] = False
            seen.setdefault(pid, fid)
            if is_blank(row["material"]):
                self.error(display, where, "material", "value is missing")
            elif row["material"] not in materials and materials:
                self.error(display, where, "material", f"unknown material {row['material']!r} (not in materials.csv)")
            if is_blank(row["base"]):
                self.error(display, where, "base", "value is missing (floor, toe or level:<z in metres>)")
            else:
                try:
                    parse_base(row["base"])
                except ValueError as err:
                    self.error(display, where, "base", str(err))
            density = row["density_t_m3"]
            if not is_blank(density):
                try:
                    value = float(density)
                except (TypeError, ValueError):
                    self.error(display, where, "density_t_m3", f"{density!r} is not a number")
                else:
                    if not math.isfinite(value):
                        self.error(display, where, "density_t_m3", f"{density} is not a finite number")
                    elif not value > 0:
                        self.error(display, where, "density_t_m3", f"{density} must be greater than 0")
            geom = row.geometry
            if not isinstance(geom, shapely.Geometry):   # NULL: a row reads it as NaN
                self.error(display, where, "geometry", "no geometry (NULL)")
                good[i] = False
            elif geom.is_empty:
                self.error(display, where, "geometry", "empty geometry")
                good[i] = False
            elif geom.geom_type not in ("Polygon", "MultiPolygon"):
                self.error(display, where, "geometry", f"{geom.geom_type} is not a polygon")
                good[i] = False
            elif not geom.is_valid:
                self.error(display, where, "geometry", f"invalid polygon: {shapely.is_valid_reason(geom)}")
                good[i] = False
        if not len(frame):
            self.error(display, "layer piles", None, "the layer has no features")
        valid = frame[good]
        if len(valid) > 1:
            tree = shapely.STRtree(valid.geometry.values)
            left, right = tree.query(valid.geometry.values, predicate="intersects")
            for a, b in zip(left, right):
                if a >= b:
                    continue
                area = valid.geometry.values[a].intersection(valid.geometry.values[b]).area
                if area > OVERLAP_TOLERANCE_M2:
                    fa, fb = valid.index[a], valid.index[b]
                    self.error(
                        display,
                        f"feature {fb} (pile {valid.iloc[b]['pile_id']})",
                        "geometry",
                        f"overlaps pile {valid.iloc[a]['pile_id']} (feature {fa}) by {area:.2f} m2",
                    )
        frame = frame.reset_index(drop=True)
        return frame[["pile_id", "material", "base", "density_t_m3", "geometry"]]

    def _small_footprints(self, piles, cell: float) -> None:
        """Warn of a footprint smaller than one grid cell: its volume (its share of the cells
        it covers) is next to nothing, and its variance about -100 % (a footprint drawn in the
        wrong units, say)."""
        import shapely

        if not (isinstance(cell, (int, float)) and math.isfinite(cell) and cell > 0):
            return   # the schema's error, reported on its own
        display = self.rel(self.root / "piles.gpkg")
        for pid, geom in zip(piles["pile_id"], piles.geometry):
            if (isinstance(geom, shapely.Geometry) and geom.geom_type in ("Polygon", "MultiPolygon")
                    and geom.is_valid and not geom.is_empty and geom.area < cell * cell):   # others are refused
                self.warn(display, f"pile {pid}", "geometry",
                          f"footprint of {geom.area:.3g} m2 is smaller than one grid cell ({cell * cell:g} m2 at "
                          f"[grid] cell_size_m = {cell:g}): its volume is next to nothing (drawn in other units?)")

    def _piles_in_site_crs(self, frame, path: Path, site_crs: str):
        """The footprints in the site CRS: drawn in another CRS, they are reprojected (the
        GeoPackage states its CRS, so the transform is not a guess) with a warning; without a
        known transform the layer is refused."""
        from pyproj import CRS
        from pyproj.exceptions import ProjError

        dst = CRS.from_user_input(site_crs)
        if frame.crs.equals(dst, ignore_axis_order=True):
            return frame
        import shapely

        src_name = frame.crs.name
        try:
            moved = frame.to_crs(dst)
            why = ""
            if not np.all(np.isfinite(shapely.get_coordinates(moved.geometry.values))):
                moved, why = None, " (the transform gives no finite coordinates)"
        except ProjError as err:
            moved, why = None, f" ({err})"
        if moved is None:
            self.error(path, "layer piles", None,
                       f"CRS {src_name!r} differs from the site's {dst.name!r} and no transform is known{why}")
            return None
        self.warn(path, "layer piles", None,
                  f"footprints are in {src_name!r}, not the site CRS {site_crs} ({dst.name}); reprojected to {site_crs}")
        return moved

    def _look_alikes(self, folder: Path, name: str) -> set[Path]:
        """Files in ``folder`` that look meant as the table ``name`` but are not read: the
        name in other letter case, or another format (``weighbridge.xlsx``). Refused when
        ``name`` itself is absent (the table's records would silently be missing), a warning
        beside it. Returns them."""
        stem = name.rsplit(".", 1)[0].lower()
        found = {other for other in folder.iterdir()
                 if other.name != name and other.is_file() and other.stem.lower() == stem
                 and other.suffix.lower() not in POINT_CLOUD_SUFFIXES}   # a cloud is read as one
        present = (folder / name).exists()
        for other in sorted(found):
            if present:
                self.warn(other, None, None, f"ignored: the tool reads {name} in this folder")
            else:
                self.error(other, None, None, f"not read: the tool reads {name} (comma-separated text, that "
                           f"name in lower case); save or rename it as {name}")
        return found

    def _opening(self, pile_ids: set[str], raw: dict) -> pd.DataFrame | None:
        path = self.root / "opening.csv"
        self._look_alikes(self.root, "opening.csv")
        if not path.exists() and not path.is_symlink():   # a folder of its name is read, and refused as one
            if (self.root / "movements").is_dir() and not self._ledger_named(raw):
                # books without an opening (a site measured with `volumes` only has no books)
                self.warn(path, None, None, "no opening.csv and no ledger.sqlite: the first close has no opening "
                                            "balances and will be refused")
            return None
        frame, problems = check_opening(self.table(path, "opening"), pile_ids=pile_ids or None, path=self.rel(path))
        self.problems += problems
        if pile_ids and not any(q.severity == "error" for q in problems) and len(frame):
            for pile in sorted(set(pile_ids) - set(frame["pile_id"])):
                self.warn(path, None, "pile_id", f"pile {pile!r} has no opening balance: a close that opens from "
                                                 "opening.csv opens it at 0 t")
        return frame

    def _opening_months(self, opening: pd.DataFrame, surveys: dict, tz: ZoneInfo) -> None:
        """Without a ledger, the first close opens from opening.csv only in the month its
        balances are dated (earlier movements would be skipped): a balance dated in a month
        without a survey can open no close (a warning: the close refuses it, naming the line)."""
        surveyed = {d[:7] for d in surveys}
        for row in opening.itertuples():
            as_of = getattr(row, "as_of", None)
            if as_of is None or pd.isna(as_of):
                continue
            month = str(Period.of(pd.Timestamp(as_of).tz_convert(tz).date()))
            if month not in surveyed:
                self.warn(str(row.source), int(row.line), "as_of",
                          f"dated in {month}, a month without a survey: with no ledger, a close opens from "
                          f"opening.csv only in the month its balances are dated (surveyed: {', '.join(sorted(surveyed))})")

    def _ledger_named(self, raw: dict) -> bool:
        """Whether the site has a ledger a close could open from: ``ledger.sqlite`` or a shared
        ledger named in site.toml."""
        named = isinstance(raw.get("ledger"), dict) and bool(raw["ledger"].get("url"))
        return named or (self.root / "ledger.sqlite").exists()

    # -- movements
    def _all_movements(self, pile_ids: set[str], material_names: set[str], scales: dict[str, Scale],
                       tz: ZoneInfo | None) -> dict[str, Movements]:
        folder = self.root / "movements"
        out: dict[str, Movements] = {}
        if not folder.is_dir():
            return out
        for sub in sorted(folder.iterdir()):
            if not sub.is_dir():
                continue
            if not Period.is_period(sub.name):
                if re.fullmatch(r"\d{4}-\d{2}", sub.name):
                    # shaped like a month but none (2026-13, 2026-00): a typo that would drop the
                    # month's movements, as a survey folder of no real date is refused
                    self.error(sub, None, None, "folder name is not a real month (YYYY-MM, month 01-12)")
                else:
                    self.warn(sub, None, None, "folder name is not a period YYYY-MM (ignored)")
                continue
            start = len(self.problems)
            out[sub.name] = self._movements(sub, pile_ids, material_names, scales, tz)
            self.by_period[sub.name] = self.problems[start:]
        return out

    def _movements(self, folder: Path, piles: set[str], materials: set[str], scales: dict[str, Scale],
                   tz: ZoneInfo | None) -> Movements:
        tables: dict[str, pd.DataFrame | None] = {}
        look_alikes: set[Path] = set()
        for name in MOVEMENT_TABLES:
            path = folder / f"{name}.csv"
            look_alikes |= self._look_alikes(folder, path.name)
            # a header alone is a table with no records this month
            # a folder of the table's name is read, and refused as one: never taken for no records
            # a link that leads nowhere is read, and refused: never taken for no records either
            tables[name] = self.table(path, name, empty_ok=True) if path.exists() or path.is_symlink() else None
        for extra in sorted(folder.glob("*.csv")):
            if extra.stem not in MOVEMENT_TABLES and extra not in look_alikes:
                self.warn(extra, None, None, "not a movement table this tool reads (ignored)")
        # an empty register failed to load and is reported on its own: do not also name every row
        frames, problems = check_movements(
            **tables, scales=scales, pile_ids=piles or None, materials=materials or None, folder=self.rel(folder),
            period=Period.parse(folder.name), timezone=tz,
        )
        self.problems += problems
        return Movements(folder.name, **frames)

    def _tickets_against_piles(self, movements: dict[str, Movements], material_of: dict) -> None:
        """A ticket whose material is not its pile's is a warning: a keyed pile id, or the
        wrong product on the truck. The close's book step says so itself, so a load for a
        close (``load_site(path, period)``) does not issue these: they are filed under a key of
        no period in ``by_period``."""
        for month, period in movements.items():
            wb = period.weighbridge
            if wb is None or not len(wb) or "material" not in wb:
                continue
            pile_material = wb["pile_id"].map(material_of)
            odd = wb["material"].notna() & pile_material.notna() & (wb["material"] != pile_material)
            start = len(self.problems)
            for r in wb[odd].itertuples():
                self.warn(str(r.source), int(r.line), "material",
                          f"ticket {r.ticket} carries {r.material!r} into pile {r.pile_id} of {material_of[r.pile_id]!r}")
            self.by_period.setdefault(f"{month} (book step)", []).extend(self.problems[start:])

    # -- surveys
    def _surveys(self, site_crs: str, config: SiteConfig, tz: ZoneInfo | None) -> dict[str, SurveyRef]:
        folder = self.root / "surveys"
        out: dict[str, SurveyRef] = {}
        if not folder.is_dir():
            return out
        for sub in sorted(folder.iterdir()):
            if not sub.is_dir():
                continue
            if not _SURVEY_DIR.match(sub.name):
                self.warn(sub, None, None, "folder name is not a survey date YYYY-MM-DD (ignored)")
                continue
            try:
                day = date.fromisoformat(sub.name)
            except ValueError:
                self.error(sub, None, None, "folder name is not a real date")
                continue
            ref = self._survey(sub, day, site_crs, config, tz)
            if ref is not None:
                out[sub.name] = ref
        return out

    def _survey(self, folder: Path, day: date, site_crs: str, config: SiteConfig, tz) -> SurveyRef | None:
        from inventory.io.cloudcheck import inspect_cloud

        files = sorted(p for p in folder.iterdir() if p.is_file() and p.suffix.lower() in POINT_CLOUD_SUFFIXES)
        for path in [p for p in files if self.outside(p)]:
            self.error(path, None, None, f"links to a file outside the site folder (refused; {_OUTSIDE_WHY})")
            files.remove(path)
        # a poses table saved under another name leaves the files unplaced (refused)
        misnamed = [name for name in ("stations.csv", "trajectory.csv", "control.csv")
                    if self._look_alikes(folder, name) and not (folder / name).exists()]
        stations = None
        station_path = folder / "stations.csv"
        if station_path.is_file():
            stations = self.table(station_path, "stations")
            pose_cols = ["x", "y", "z", "roll_deg", "pitch_deg", "yaw_deg"]
            seen: dict[tuple, int] = {}
            for row in stations.itertuples():
                scan = "" if row.scan is None or pd.isna(row.scan) else str(row.scan).strip()
                if scan and not str(row.file).lower().endswith(".e57"):
                    self.error(station_path, row.line, "scan", "a scan is named for E57 files only")
                if (row.file, scan) in seen:
                    what = f"scan {scan!r} of {row.file}" if scan else repr(row.file)
                    self.error(station_path, row.line, "scan" if scan else "file",
                               f"{what} is listed twice (first on line {seen[(row.file, scan)]})")
                seen.setdefault((row.file, scan), row.line)
                given = [c for c in pose_cols if getattr(row, c) is not None and not pd.isna(getattr(row, c))]
                if given and len(given) != len(pose_cols):
                    missing = [c for c in pose_cols if c not in given]
                    self.error(station_path, row.line, missing[0], "a station pose needs all of x, y, z, roll_deg, pitch_deg, yaw_deg")
                if self.outside(folder / row.file):
                    self.error(station_path, row.line, "file", f"{row.file!r} is outside the site folder (refused; {_OUTSIDE_WHY})")
                elif not _is_file(folder / row.file):
                    self.error(station_path, row.line, "file", f"no file {row.file!r} in {self.rel(folder)}")
        trajectories: dict = {}
        trajectory_path = folder / "trajectory.csv"
        if trajectory_path.is_file():
            from inventory.site.trajectory import read_trajectories

            trajectories = read_trajectories(
                trajectory_path, config.machines, display=self.rel(trajectory_path), problems=self.problems
            ) or {}
            for name in trajectories:
                if name is not None and self.outside(folder / name):
                    self.error(trajectory_path, None, "file", f"{name!r} is outside the site folder (refused; {_OUTSIDE_WHY})")
                elif name is not None and not _is_file(folder / name):
                    self.error(trajectory_path, None, "file", f"no file {name!r} in {self.rel(folder)}")
        if not files:
            self.error(folder, None, None, "no point cloud file (.las, .laz, .copc.laz, .e57, .ply, .xyz, .txt) "
                       "in the survey folder")
            return None
        control = None
        control_path = folder / "control.csv"
        if control_path.is_file():
            from inventory.site.control import read_control

            control = read_control(control_path, model=config.survey.control_model,
                                   tolerance_m=config.survey.control_rms_max_m, display=self.rel(control_path),
                                   problems=self.problems)
        posed = {}
        scan_rows: dict[str, list] = {}
        if stations is not None:
            pose_cols = ["x", "y", "z", "roll_deg", "pitch_deg", "yaw_deg"]
            for row in stations.itertuples():
                if row.scan is not None and not pd.isna(row.scan) and str(row.scan).strip():
                    scan_rows.setdefault(row.file, []).append(row)
                    continue
                values = [getattr(row, c) for c in pose_cols]
                if all(v is not None and not pd.isna(v) for v in values):
                    posed[row.file] = row
                elif any(v is not None and not pd.isna(v) for v in values):
                    posed[row.file] = None  # a partial pose, already reported
        station_files = set(stations["file"]) if stations is not None else set()
        e57_all_posed: set[str] = set()   # E57 files whose every scan has its pose from stations.csv
        e57_times: list[datetime] = []     # when E57 files say their scans ended
        readable = []
        empty = []   # files that hold no point
        extents = []
        points = 0
        for path in files:
            if path.suffix.lower() == ".e57":
                info = self._e57(path, station_path, posed.get(path.name), scan_rows.get(path.name, []))
                if info is None:
                    continue
                info, all_posed, acquired = info
                if all_posed:
                    e57_all_posed.add(path.name)
                if acquired is not None:
                    e57_times.append(acquired)
            else:
                info = inspect_cloud(path)
            if info.error:
                why = f"unreadable point cloud ({info.error})" if path.suffix.lower() in (".las", ".laz") else info.error
                found = info.problem
                if found is not None:   # the reader's own file (a .prj beside it), line and field
                    self.error(Path(found.path).absolute(), found.where, found.field, why)
                else:
                    self.error(path, None, None, why)
                continue
            if info.point_count == 0:
                # a scan that recorded nothing: left out, or its header's empty box at 0,0 would
                # stretch the survey's grid from there
                self.warn(path, None, None, "holds no point: left out of the survey")
                empty.append(path)
                continue
            readable.append(path)
            points += info.point_count
            is_e57 = path.suffix.lower() == ".e57"
            row = posed.get(path.name) if not is_e57 else None
            moving = None if is_e57 or path.name in posed else (
                trajectories.get(path.name) or (trajectories.get(None) if path.name not in station_files else None))
            if control_path.is_file():
                if control is None:
                    continue   # control.csv's own error says why the files cannot be placed
                # every file lands in the survey's own frame first, then moves by the control fit
                if row is not None:
                    box, z = _posed_extent(info.bounds, row), (row.z - 1.0, row.z + 1.0)
                elif moving is not None:
                    box, z = moving.extent(info.bounds[0], info.bounds[1]), (info.bounds[0][2], info.bounds[1][2])
                else:
                    (x0, y0, z0), (x1, y1, z1) = info.bounds
                    box, z = (x0, y0, x1, y1), (z0, z1)
                corners = np.array([[a, b, c] for a in (box[0], box[2]) for b in (box[1], box[3]) for c in z])
                moved = control.transform.apply_xyz(corners)
                extents.append((moved[:, 0].min(), moved[:, 1].min(), moved[:, 0].max(), moved[:, 1].max()))
                continue
            if path.name in posed and not is_e57:
                if row is not None:
                    extents.append(_posed_extent(info.bounds, row))
                continue
            if moving is not None:
                extents.append(moving.extent(info.bounds[0], info.bounds[1]))
                continue
            if is_e57 and path.name in e57_all_posed:
                extents.append((info.bounds[0][0], info.bounds[0][1], info.bounds[1][0], info.bounds[1][1]))
                continue
            crs_text = info.crs_wkt
            if crs_text is None:
                if config.survey.default_crs is None:
                    if path.suffix.lower() in (".ply", ".xyz", ".txt"):
                        self.error(path, None, "crs", f"carries no CRS: give it in {path.with_suffix('.prj').name} or "
                                   "crs.prj beside it, a pose in stations.csv, control points in control.csv, or "
                                   "[survey] default_crs in site.toml")
                    else:
                        self.error(path, None, "crs", "the file carries no CRS, has no pose in stations.csv, and site.toml has no [survey] default_crs")
                    continue
                crs_text = config.survey.default_crs
            bounds, why = _reproject_bounds(info.bounds, crs_text, site_crs)
            if why:
                self.error(path, None, "crs", why)
                continue
            extents.append(bounds)
        if not readable:
            if files and len(empty) == len(files):
                self.error(folder, None, None, "no point in any point cloud file of the survey folder")
            elif files:
                self.error(folder, None, None, "no readable point cloud in the survey folder")
            return None
        if stations is not None and stations["time"].notna().any():
            instant = max(stations["time"]).to_pydatetime()
        elif trajectories:
            from inventory.model.pose import utc_from_adjusted_gps

            instant = max(utc_from_adjusted_gps(t.span[1]) for t in trajectories.values())
        elif e57_times:
            instant = max(e57_times)   # the E57 files' own acquisition times
        else:
            hh, mm = (int(v) for v in config.survey.default_time.split(":"))
            zone = tz or timezone.utc
            instant = datetime.combine(day, time(hh, mm), tzinfo=zone).astimezone(timezone.utc)
            if not (station_path.is_file() and self.errors_in(station_path, "time")):
                # a refused station time is reported as such, not again as a missing one
                self.warn(folder, None, "time", f"no stations.csv times; survey instant taken as {config.survey.default_time} local")
        local_day = instant.astimezone(tz).date() if tz else instant.date()
        if abs((local_day - day).days) > _SCAN_DAYS_OFF:
            # the survey instant is the latest scan time and cuts the books: a scan dated months
            # or years from its folder's date is a date error, not an overnight survey
            why = (f"the scans end on {local_day}, more than a day from the folder's date {day} (a date error? "
                   "the latest scan time is the survey instant, which decides the movements booked before it)")
            if stations is not None and stations["time"].notna().any():
                for row in stations[stations["time"].notna()].itertuples():
                    on = pd.Timestamp(row.time).tz_convert(tz or timezone.utc).date()
                    if abs((on - day).days) > _SCAN_DAYS_OFF:
                        self.error(station_path, int(row.line), "time",
                                   f"{pd.Timestamp(row.time).tz_convert(tz or timezone.utc).isoformat()} is more than "
                                   f"a day from the folder's date {day} (a date error? the latest scan time is the "
                                   "survey instant, which decides the movements booked before it)")
            elif trajectories:
                self.error(trajectory_path, None, "time", why)
            else:
                self.error(folder, None, "time", why)
        elif local_day != day:
            self.warn(station_path, None, "time", f"scan times fall on {local_day}, not on the folder's date {day}")
        extent = None
        # a stations.csv or trajectory.csv with refused rows (or refused whole) leaves files
        # where their own coordinates put them: an extent from those would add a false alarm;
        # it is checked once the poses are right
        unplaced = misnamed or any(q.is_file() and self.errors_in(q) for q in (station_path, trajectory_path))
        if extents and not unplaced:
            arr = np.asarray(extents)
            extent = (arr[:, 0].min(), arr[:, 1].min(), arr[:, 2].max(), arr[:, 3].max())
        return SurveyRef(folder.name, folder, readable, stations, instant, extent, points, control)

    def _e57(self, path: Path, station_path: Path, file_row: Any, scan_rows: list) -> Any:
        """Look over an E57 file with the scan poses stations.csv gives it: ``(CloudInfo,
        every scan posed by stations.csv, when its scans ended (UTC) or None)``; ``None`` when a
        stations.csv row names no scan of it (reported)."""
        from inventory.io.cloudcheck import CloudInfo, inspect_cloud
        from inventory.io.e57 import E57Reader
        from inventory.model.pose import rotation_matrix

        try:
            with E57Reader(path) as reader:
                rows = list(scan_rows) + ([file_row] if file_row is not None else [])
                found = [(row, reader.scan_index("" if row is file_row else str(row.scan))) for row in rows]
                count = len(reader.scans)
                acquired = reader.acquired_utc()
        except Exception as err:  # inventory.errors.InputError: the reader names what is wrong
            return CloudInfo(path, error=getattr(err, "why", str(err))), False, None
        poses = {}
        given_on: dict[int, int] = {}
        given_on_text: dict[int, str] = {}
        for row, idx in found:
            if idx is None:
                what = f"no scan {str(row.scan)!r}" if row is not file_row else f"{count} scans: give each pose a scan"
                self.error(station_path, row.line, "scan", f"{path.name} has {what} (numbers 1-{count} or names)")
                return None
            if idx in given_on:   # one scan named twice, by number and by name
                if str(row.scan) == given_on_text[idx]:
                    return None   # the same text twice: the row rules said so already
                self.error(station_path, row.line, "scan", f"{str(row.scan)!r} is scan {idx + 1} of {path.name}, "
                           f"already given on line {given_on[idx]}")
                return None
            given_on[idx], given_on_text[idx] = int(row.line), str(row.scan)
            values = np.array([row.x, row.y, row.z, row.roll_deg, row.pitch_deg, row.yaw_deg], dtype=float)
            if not np.all(np.isfinite(values)):
                continue   # a blank pose: the scan keeps its own pose (one is needed, checked below)
            poses[idx] = (rotation_matrix(row.roll_deg, row.pitch_deg, row.yaw_deg), np.array([row.x, row.y, row.z]))
        info = inspect_cloud(path, poses=poses)
        found_problem = info.problem
        if (info.error and found_problem is not None and found_problem.field == "pose"
                and self.errors_in(station_path)):
            return None   # a pose row stations.csv refused is the cause; its own error says so
        return info, len(poses) == count, acquired

    def _floor_under_piles(self, path: Path, piles, site_crs: str) -> None:
        """Each pile whose base is ``floor`` needs floor heights under its footprint: a raster
        in another place, another CRS wrongly labelled, or all nodata would leave the pile
        without a volume, and its variance out of every total. No value under a footprint is
        an error; part of it, or a raster without a CRS (taken as the site's), a warning."""
        import numpy as np
        import rasterio
        import rasterio.mask
        import shapely
        from pyproj import CRS
        from rasterio.features import geometry_mask
        from rasterio.warp import transform_geom
        from rasterio.errors import RasterioError
        from shapely.geometry import mapping

        floor = piles[[parse_base(str(b))[0] == "floor" if isinstance(b, str) else False for b in piles["base"]]]
        if not len(floor):
            return
        try:
            with rasterio.open(path) as src:
                if src.crs is None:
                    self.warn(path, None, "floor_raster", f"the raster has no CRS; taken as the site's {site_crs}")
                    to_raster = False
                else:
                    to_raster = not CRS(src.crs.to_wkt()).equals(CRS(site_crs))
                for _, row in floor.iterrows():
                    geom = row.geometry
                    if not isinstance(geom, shapely.Geometry) or geom.is_empty:   # NULL reads as NaN; reported
                        continue
                    shape = mapping(geom)
                    if to_raster:
                        shape = transform_geom(site_crs, src.crs, shape)
                    try:
                        with warnings.catch_warnings():
                            # rasterio's own use of affine's '*' (a PendingDeprecationWarning
                            # per vertex of the footprint), not ours
                            warnings.simplefilter("ignore", PendingDeprecationWarning)
                            data, transform = rasterio.mask.mask(src, [shape], crop=True, filled=False, indexes=1,
                                                                 all_touched=True)
                            inside = ~geometry_mask([shape], out_shape=data.shape, transform=transform,
                                                    all_touched=True)
                    except ValueError:   # the footprint does not overlap the raster at all
                        data, inside = np.ma.masked_all((1, 1)), np.zeros((1, 1), bool)
                    values = np.ma.filled(data.astype(float), np.nan)
                    held = int((inside & np.isfinite(values)).sum())
                    cells = int(inside.sum())
                    pile = f"pile {row['pile_id']}"
                    if held == 0:
                        b = src.bounds
                        self.error(path, None, "floor_raster",
                                   f"no floor height under {pile}, whose base is floor: the raster covers x "
                                   f"{b.left:,.1f}..{b.right:,.1f}, y {b.bottom:,.1f}..{b.top:,.1f}"
                                   + ("" if src.crs is None else f" in {src.crs.to_string()}")
                                   + " (nodata there, another place, or a wrong CRS?)")
                    elif held < cells:
                        self.warn(path, None, "floor_raster",
                                  f"floor heights under {100.0 * held / cells:.0f} % of {pile} only; the rest is "
                                  "taken from the nearest floor height")
        except (RasterioError, OSError, ValueError) as err:
            # a raster that opens was read block by block already; what fails here is named
            self.error(path, None, "floor_raster", f"cannot be compared with the footprints ({err})")

    def _piles_against_surveys(self, piles, surveys: dict[str, SurveyRef]) -> None:
        import shapely
        from shapely.geometry import box

        boxes = [box(*ref.extent) for ref in surveys.values() if ref.extent is not None]
        if not boxes:
            return
        display = self.rel(self.root / "piles.gpkg")
        for i, row in piles.iterrows():
            geom = row.geometry
            if not isinstance(geom, shapely.Geometry) or geom.is_empty:   # NULL reads as NaN; reported
                continue
            if not any(b.intersects(geom) for b in boxes):
                self.warn(display, f"pile {row['pile_id']}", "geometry", "lies outside every survey's extent")


def _column_values(path: Path, column: str) -> set[str]:
    """The values of one column of a CSV file, as written (rows refused by the table's rules
    included); empty when the file cannot be read."""
    import csv
    import io

    try:
        text = path.read_bytes().decode("utf-8-sig")
    except (OSError, UnicodeDecodeError):
        return set()
    rows = csv.reader(io.StringIO(text, newline=""))
    try:  # a file csv cannot read (a value over its size limit) is reported by read_table
        header = [h.strip() for h in next(rows, [])]
        if column not in header:
            return set()
        at = header.index(column)
        return {r[at].strip() for r in rows if len(r) > at and r[at].strip()}
    except csv.Error:
        return set()


def _nesting(value: Any) -> tuple[int, str | None]:
    """How deep tables and arrays nest in parsed TOML, and the top-level key of the deepest
    (counted without recursion, so any depth can be measured)."""
    deepest, key = 0, None
    stack: list[tuple[Any, int, str | None]] = [(value, 1, None)]
    while stack:
        item, depth, top = stack.pop()
        if isinstance(item, dict):
            children = [(v, k if top is None else top) for k, v in item.items()]
        elif isinstance(item, list):
            children = [(v, top) for v in item]
        else:
            continue
        if depth > deepest:
            deepest, key = depth, top
        stack.extend((v, depth + 1, t) for v, t in children)
    return deepest, key


_TOML_HEADER = re.compile(r"^\s*(\[\[?)\s*([^\]]+?)\s*\]\]?\s*(#.*)?$")
_TOML_KEY = re.compile(r"^\s*((?:[A-Za-z0-9_-]+|\"[^\"]*\"|'[^']*')(?:\s*\.\s*(?:[A-Za-z0-9_-]+|\"[^\"]*\"|'[^']*'))*)\s*=")


def _toml_parts(dotted: str) -> tuple:
    parts = re.findall(r"\"[^\"]*\"|'[^']*'|[^.\s]+", dotted)
    return tuple(p[1:-1] if p[:1] in "\"'" else p for p in parts)


def _toml_line(text: str, fieldname: str) -> int | None:
    """The line of site.toml that sets ``fieldname`` (a dotted key as in messages:
    ``journal.accounts.coal``, ``scales.0.id``), or the nearest line that holds it (the inline
    table it is in, its table's header); ``None`` when the key is nowhere in the file.

    A line-by-line reading of TOML's tables and keys (enough for messages; the file has been
    parsed already): keys inside multi-line strings or arrays are not looked into.
    """
    want = tuple(str(p) for p in _toml_parts(fieldname))
    best: tuple[int, int] | None = None   # (matched length, line)
    table: tuple = ()
    arrays: dict[tuple, int] = {}
    for number, line in enumerate(text.splitlines(), start=1):
        head = _TOML_HEADER.match(line)
        key = None if head else _TOML_KEY.match(line)
        if head:
            names = _toml_parts(head.group(2))
            if head.group(1) == "[[":
                arrays[names] = arrays.get(names, -1) + 1
                table = names + (str(arrays[names]),)
            else:
                table = names
            full = table
        elif key:
            full = table + _toml_parts(key.group(1))
        else:
            continue
        full = tuple(str(p) for p in full)
        if full == want[:len(full)] and (best is None or len(full) > best[0]):
            best = (len(full), number)
    return None if best is None else best[1]


def _non_finite(value: Any, keys: tuple = ()) -> list[tuple[tuple, float]]:
    """``(key path, value)`` of every NaN or infinite float in parsed TOML."""
    if isinstance(value, float):
        return [] if math.isfinite(value) else [(keys, value)]
    if isinstance(value, dict):
        return [hit for k, v in value.items() for hit in _non_finite(v, keys + (k,))]
    if isinstance(value, list):
        return [hit for i, v in enumerate(value) for hit in _non_finite(v, keys + (i,))]
    return []


#: How many days a survey's scan times may fall from its folder's date: a survey over midnight,
#: or a folder named after the day the data came in (a warning); more is a date error.
_SCAN_DAYS_OFF = 1


def _not_a_file(path: Path) -> str:
    """Why a file the site needs is not there: missing, a folder of its name, or a link that
    leads to no file."""
    if path.is_dir():
        return "is a folder, not a file"
    if path.is_symlink():
        try:
            target = os.readlink(path)
        except OSError:
            target = "?"
        return f"a link to {target!r}, which leads to no file"
    return "file not found"


def _is_file(path: Path) -> bool:
    """``path.is_file()``, False for a name the system cannot look up (too long, say)."""
    try:
        return path.is_file()
    except (OSError, ValueError):
        return False


def _posed_extent(bounds, row) -> tuple[float, float, float, float]:
    from inventory.model.pose import rotation_matrix

    (x0, y0, z0), (x1, y1, z1) = bounds
    corners = np.array([[x, y, z] for x in (x0, x1) for y in (y0, y1) for z in (z0, z1)])
    rot = rotation_matrix(row.roll_deg, row.pitch_deg, row.yaw_deg)
    placed = corners @ rot.T + np.array([row.x, row.y, row.z])
    return (placed[:, 0].min(), placed[:, 1].min(), placed[:, 0].max(), placed[:, 1].max())


def _reproject_bounds(bounds, crs_text: str, site_crs: str) -> tuple[tuple | None, str | None]:
    from pyproj import CRS, Transformer
    from pyproj.exceptions import CRSError as ProjCRSError
    from pyproj.exceptions import ProjError

    (x0, y0, _), (x1, y1, _) = bounds
    try:
        src = CRS.from_user_input(crs_text)
    except ProjCRSError as err:
        return None, f"unknown CRS in the file ({err})"
    dst = CRS.from_user_input(site_crs)
    if src.equals(dst, ignore_axis_order=True):
        return (x0, y0, x1, y1), None
    try:
        tf = Transformer.from_crs(src, dst, always_xy=True)
        xs, ys = tf.transform([x0, x1, x0, x1], [y0, y0, y1, y1], errcheck=True)
    except ProjError as err:
        return None, f"CRS {src.name!r} differs from the site's {dst.name!r} and no transform is known ({err})"
    if not np.all(np.isfinite(xs)) or not np.all(np.isfinite(ys)):
        return None, f"CRS {src.name!r} differs from the site's {dst.name!r} and no transform is known"
    return (min(xs), min(ys), max(xs), max(ys)), None
