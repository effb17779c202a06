"""Read and validate a case folder.

A case is a folder holding ``case.toml``, ``sites.csv``, ``suppliers.csv``, ``items.csv``, either
``demand.csv`` or ``history.csv``, and optionally ``stocking.csv`` and ``policies.csv``. The README's
"Case format" section documents every file and column. :func:`load_case` checks everything once; every broken
rule raises :class:`optimiser.errors.CaseError` naming the file, the row (as a spreadsheet shows it: header =
row 1), the column and the rule.
"""

from __future__ import annotations

import csv
import math
import re
import tomllib
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from optimiser.errors import CaseError

__all__ = [
    "Settings",
    "Case",
    "load_case",
    "read_policies",
    "stocked_pairs",
    "ancestors",
    "MODES",
    "BACKORDER_BASES",
    "DISTRIBUTIONS",
]

MODES = ("cost", "cycle_service", "fill_rate")
BACKORDER_BASES = ("per_unit", "per_unit_year")
DISTRIBUTIONS = ("normal", "poisson", "negbin", "auto")
#: How stores behind a warehouse are evaluated (README, "Multi-echelon network"): "auto" - unit by unit where
#: every store has count demand (variance/mean up to 4), else by the delay moments; "units" - unit by unit for
#: every item the sizes allow, normal demand taken as counts with its mean and variance (slower); "moments".
STORE_MODELS = ("auto", "units", "moments")
DEFAULT_STORE_MODEL = "auto"

DEFAULT_DAYS_PER_YEAR = 365.0
DEFAULT_HOLDING_RATE = 0.25  # common practice: 20-30 % of unit cost per year
DEFAULT_MODE = "cost"
DEFAULT_BACKORDER_BASIS = "per_unit"
DEFAULT_DISTRIBUTION = "auto"

#: site names become folder names under ``sites/``: letters, digits, space, dot, dash, underscore.
SITE_NAME_PATTERN = re.compile(r"^\w[\w .\-]*$")

TOML_KEYS = {"name", "currency", "days_per_year", "holding_rate", "distribution", "store_model", "service"}
SERVICE_KEYS = {"mode", "target", "backorder_basis"}


@dataclass(frozen=True)
class Settings:
    """Case-wide settings read from ``case.toml``.

    Attributes
    ----------
    name, currency : str
        Case name and the currency every cost is given in.
    days_per_year : float
        Days in a year of demand (365 by default; e.g. 300 for a six-day business).
    holding_rate : float
        Annual holding cost as a fraction of unit cost (used where an item gives no ``holding_cost``).
    mode : str
        ``"cost"`` (minimise ordering + holding + backorder cost), ``"cycle_service"`` or ``"fill_rate"``.
    target : float or None
        Default service target in (0, 1) for the service modes.
    backorder_basis : str
        ``"per_unit"`` (cost per unit short) or ``"per_unit_year"`` (cost per unit backordered per year).
    distribution : str
        Default lead-time demand distribution: ``"normal"``, ``"poisson"``, ``"negbin"`` or ``"auto"``.
    store_model : str
        How stores behind a warehouse are evaluated: ``"auto"``, ``"units"`` or ``"moments"``
        (:data:`STORE_MODELS`).
    """

    name: str
    currency: str = ""
    days_per_year: float = DEFAULT_DAYS_PER_YEAR
    holding_rate: float = DEFAULT_HOLDING_RATE
    mode: str = DEFAULT_MODE
    target: float | None = None
    backorder_basis: str = DEFAULT_BACKORDER_BASIS
    distribution: str = DEFAULT_DISTRIBUTION
    store_model: str = DEFAULT_STORE_MODEL

    def as_dict(self) -> dict[str, Any]:
        """Plain dict of the settings (for ``summary.json``)."""
        return {
            "name": self.name,
            "currency": self.currency,
            "days_per_year": self.days_per_year,
            "holding_rate": self.holding_rate,
            "mode": self.mode,
            "target": self.target,
            "backorder_basis": self.backorder_basis,
            "distribution": self.distribution,
            "store_model": self.store_model,
        }


@dataclass(frozen=True)
class Case:
    """A validated case. Tables are pandas DataFrames with the columns of the README's case format."""

    path: Path
    settings: Settings
    sites: pd.DataFrame
    suppliers: pd.DataFrame
    items: pd.DataFrame
    demand: pd.DataFrame
    stocking: pd.DataFrame | None
    policies: pd.DataFrame | None
    warnings: list[str] = field(default_factory=list)
    demand_source: str = "demand.csv"
    #: spreadsheet row of each table row, per file name (for messages about rows found after loading)
    rows: dict[str, list[int]] = field(default_factory=dict)


# --------------------------------------------------------------------------------------------- columns


@dataclass(frozen=True)
class _Col:
    """Specification of one CSV column."""

    name: str
    kind: str = "num"  # "id" | "text" | "num" | "choice" | "date"
    required: bool = True
    default: Any = math.nan
    minimum: float | None = None
    strict: bool = False  # minimum excluded (value must be > minimum)
    below_one: bool = False  # value must be < 1 (targets)
    integer: bool = False
    choices: tuple[str, ...] = ()
    signed: bool = False  # negative values allowed (reorder points)

    def rule_text(self) -> str:
        if self.strict:
            return f"must be greater than {self.minimum:g}"
        return "must not be negative"


def _num(name: str, required: bool = True, default: Any = math.nan, **kw: Any) -> _Col:
    kw.setdefault("minimum", 0.0)
    return _Col(name, "num", required, default, **kw)


SITES_COLUMNS = [
    _Col("site", "id"),
    _Col("upstream", "text", required=False, default=""),
    _num("transit_days", required=False),
    _num("transit_days_sd", required=False, default=0.0),
    _num("delivery_cost", required=False, default=0.0),
]
SUPPLIERS_COLUMNS = [
    _Col("supplier", "id"),
    _num("lead_days"),
    _num("lead_days_sd", required=False, default=0.0),
    _num("order_cost"),
    _num("line_cost", required=False, default=0.0),
    _num("capacity_volume", required=False, strict=True),
    _num("capacity_weight", required=False, strict=True),
    _num("min_order_value", required=False, default=0.0),
]
ITEMS_COLUMNS = [
    _Col("item", "id"),
    _Col("supplier", "id"),
    _num("unit_cost"),
    _num("holding_cost", required=False),
    _num("backorder_cost", required=False, strict=True),
    _num("pack_size", required=False, default=1.0, strict=True, integer=True),
    _num("volume", required=False),
    _num("weight", required=False),
    _Col("distribution", "choice", required=False, default="", choices=DISTRIBUTIONS),
    _num("line_cost", required=False),  # joint replenishment: overrides the supplier's line_cost
    _num("shelf_life_days", required=False, strict=True),  # joint replenishment: longest order interval
]
DEMAND_COLUMNS = [
    _Col("site", "id"),
    _Col("item", "id"),
    _num("daily_mean"),
    _num("daily_sd"),
]
HISTORY_COLUMNS = [
    _Col("date", "date"),
    _Col("site", "id"),
    _Col("item", "id"),
    _num("quantity"),
]
STOCKING_COLUMNS = [
    _Col("site", "id"),
    _Col("item", "id"),
    _num("order_quantity", required=False, strict=True),
    _num("pack_size", required=False, strict=True, integer=True),
    _num("target", required=False, strict=True, below_one=True),
    _num("backorder_cost", required=False, strict=True),
]
POLICIES_COLUMNS = [
    _Col("site", "id"),
    _Col("item", "id"),
    _num("reorder_point", signed=True, minimum=None),
    _num("order_quantity"),  # 0 only where there is no demand (checked against the item-site table)
]


# --------------------------------------------------------------------------------------------- reading


def _read_csv(path: Path, label: str, spec: list[_Col], warnings: list[str]) -> pd.DataFrame:
    """Read one CSV file and check every cell against ``spec``.

    Returns a DataFrame with the spec's columns (optional ones filled with defaults) and a ``rownum`` column
    holding the spreadsheet row number of each record.
    """
    if not path.is_file():
        raise CaseError(label, "file is missing")
    try:
        with path.open(newline="", encoding="utf-8-sig") as handle:
            records = list(csv.reader(handle))
    except UnicodeDecodeError as exc:
        raise CaseError(label, f"file is not UTF-8 text ({exc.reason})") from None
    except csv.Error as exc:
        raise CaseError(label, f"not a readable CSV file ({exc})") from None
    if not records or not any(cell.strip() for cell in records[0]):
        raise CaseError(label, "file is empty: the first row must name the columns", row=1)
    header = [cell.strip() for cell in records[0]]
    seen: set[str] = set()
    for name in header:
        if name in seen and name:
            raise CaseError(label, "column appears twice in the header", row=1, column=name)
        seen.add(name)
    known = {c.name for c in spec}
    for col in spec:
        if col.required and col.name not in header:
            raise CaseError(label, "required column is missing from the header", row=1, column=col.name)
    unknown = [h for h in header if h and h not in known]
    if unknown:
        warnings.append(f"{label}: column(s) {', '.join(unknown)} are not used by rqnet and were ignored")
    index = {name: i for i, name in enumerate(header) if name in known}

    width = len(header)
    kept: list[list[str]] = []
    rows: list[int] = []
    long_row: tuple[int, int] | None = None
    for number, record in enumerate(records[1:], start=2):
        if not "".join(record).strip():
            continue  # blank line
        if len(record) > width:
            if long_row is None and "".join(record[width:]).strip():
                long_row = (number, len(record))
            record = record[:width]
        elif len(record) < width:
            record = record + [""] * (width - len(record))
        kept.append(record)
        rows.append(number)
    cells = np.array(kept, dtype=object).reshape(len(kept), width)
    row_numbers = np.asarray(rows, dtype=np.int64)

    data: dict[str, Any] = {}
    first_bad: tuple[int, int, str] | None = None  # (row, spec position, raw cell) of the first broken rule
    for position, col in enumerate(spec):
        pos = index.get(col.name)
        if pos is None:
            raw = pd.Series([""] * len(kept), dtype=object)
        else:
            raw = pd.Series(cells[:, pos], dtype=object).str.strip()
        values, bad = _parse_column(raw, col)
        data[col.name] = values
        if bad.any():
            k = int(np.flatnonzero(bad)[0])
            if first_bad is None or (row_numbers[k], position) < first_bad[:2]:
                first_bad = (int(row_numbers[k]), position, str(raw.iloc[k]))
    if long_row is not None and (first_bad is None or long_row[0] < first_bad[0]):
        raise CaseError(label, f"row has {long_row[1]} cells but the header names {width}", row=long_row[0])
    if first_bad is not None:
        row, position, raw_cell = first_bad
        _parse_cell(raw_cell, spec[position], label, row)  # raises the message for this cell
        raise AssertionError(f"{label} row {row}: cell judged bad but accepted")  # pragma: no cover
    frame = pd.DataFrame(data)
    frame["rownum"] = row_numbers
    return frame


def _parse_column(raw: pd.Series, col: _Col) -> tuple[Any, np.ndarray]:
    """Values of one column (defaults where empty) and a mask of the cells :func:`_parse_cell` refuses.

    Vectorised twin of :func:`_parse_cell`: a cell is marked bad exactly when ``_parse_cell`` would raise for
    it, and the message then comes from ``_parse_cell`` itself.
    """
    empty = (raw == "").to_numpy()
    missing = empty & col.required
    if col.kind in ("id", "text"):
        values = raw.where(~empty, col.default if not col.required else "").astype(object)
        return values.to_numpy(dtype=object), missing
    if col.kind == "choice":
        lower = raw.str.lower()
        ok = lower.isin(col.choices).to_numpy() | empty
        values = lower.where(~empty, col.default).astype(object)
        return values.to_numpy(dtype=object), missing | ~ok
    if col.kind == "date":
        pattern = raw.str.match(_DATE_PATTERN.pattern).to_numpy(dtype=bool)
        dates = pd.to_datetime(raw.where(pattern & ~empty), format="%Y-%m-%d", errors="coerce")
        bad = missing | (~empty & dates.isna().to_numpy())
        return dates, bad
    numbers = np.array(pd.to_numeric(raw.where(~empty), errors="coerce"), dtype=float)  # a writable copy
    retry = np.flatnonzero(np.isnan(numbers) & ~empty)
    for k in retry:  # forms float() accepts but pandas does not (e.g. "1_000"); "nan" stays NaN
        try:
            value = float(raw.iloc[k])
        except ValueError:
            continue
        numbers[k] = value
    with np.errstate(invalid="ignore"):
        bad = ~np.isfinite(numbers)
        if col.below_one:
            bad |= ~((numbers > 0.0) & (numbers < 1.0))
        if col.minimum is not None and not col.signed:
            bad |= (numbers < col.minimum) | ((numbers <= col.minimum) if col.strict else False)
        if col.integer:
            bad |= numbers != np.round(numbers)
    bad = missing | (~empty & bad)
    values = np.where(empty, col.default, numbers).astype(float)
    return values, bad


def _parse_cell(raw: str, col: _Col, label: str, row: int) -> Any:
    if raw == "":
        if col.required:
            raise CaseError(label, "a value is required", row=row, column=col.name)
        return col.default
    if col.kind in ("id", "text"):
        return raw
    if col.kind == "choice":
        value = raw.lower()
        if value not in col.choices:
            raise CaseError(
                label, f"must be one of {', '.join(col.choices)}", row=row, column=col.name, value=raw
            )
        return value
    if col.kind == "date":
        try:
            return pd.Timestamp(_parse_date(raw))
        except ValueError:
            raise CaseError(
                label, "not a date (write dates as YYYY-MM-DD)", row=row, column=col.name, value=raw
            ) from None
    try:
        value = float(raw)
    except ValueError:
        raise CaseError(label, "not a number", row=row, column=col.name, value=raw) from None
    if math.isnan(value):
        raise CaseError(
            label,
            "NaN is not a value; leave the cell empty or give a number",
            row=row,
            column=col.name,
            value=raw,
        )
    if math.isinf(value):
        raise CaseError(label, "must be finite", row=row, column=col.name, value=raw)
    if col.below_one and not 0.0 < value < 1.0:
        raise CaseError(
            label, "a service target must lie strictly between 0 and 1", row=row, column=col.name, value=raw
        )
    if col.minimum is not None and not col.signed:
        if value < col.minimum or (col.strict and value <= col.minimum):
            raise CaseError(label, col.rule_text(), row=row, column=col.name, value=raw)
    if col.integer and value != round(value):
        raise CaseError(label, "must be a whole number", row=row, column=col.name, value=raw)
    return value


_DATE_PATTERN = re.compile(r"^\d{4}-\d{2}-\d{2}$")


def _parse_date(raw: str) -> Any:
    """Parse an ISO date (YYYY-MM-DD); anything else is rejected so day/month order is never guessed."""
    import datetime as _dt

    if not _DATE_PATTERN.match(raw):
        raise ValueError(raw)
    return _dt.date.fromisoformat(raw)


def _check_unique(frame: pd.DataFrame, keys: list[str], label: str) -> None:
    dup = frame.duplicated(subset=keys, keep="first")
    if dup.any():
        pos = int(np.flatnonzero(dup.to_numpy())[0])
        rec = frame.iloc[pos]
        first = frame[(frame[keys] == rec[keys]).all(axis=1)]["rownum"].iloc[0]
        what = ", ".join(f"{k} {rec[k]!r}" for k in keys)
        raise CaseError(
            label,
            f"duplicate key: {what} already given on row {first}",
            row=int(rec["rownum"]),
            column=keys[-1],
            value=rec[keys[-1]],
        )


def _check_known(
    frame: pd.DataFrame,
    column: str,
    known: Iterable[str],
    label: str,
    what: str,
    where: str,
    allow_empty: bool = False,
) -> None:
    values = frame[column]
    unknown = ~values.isin(list(known))
    if allow_empty:
        unknown &= values != ""
    if unknown.any():
        k = int(np.flatnonzero(unknown.to_numpy())[0])
        raise CaseError(
            label,
            f"unknown {what} (not in {where})",
            row=int(frame["rownum"].iloc[k]),
            column=column,
            value=values.iloc[k],
        )


# --------------------------------------------------------------------------------------------- settings


def _read_settings(folder: Path, warnings: list[str]) -> Settings:
    label = "case.toml"
    path = folder / label
    if not path.is_file():
        raise CaseError(label, "file is missing")
    try:
        with path.open("rb") as handle:
            raw = tomllib.load(handle)
    except tomllib.TOMLDecodeError as exc:
        raise CaseError(label, f"not valid TOML: {exc}") from None
    extra = sorted(set(raw) - TOML_KEYS)
    if extra:
        warnings.append(f"case.toml: key(s) {', '.join(extra)} are not used by rqnet and were ignored")
    service = raw.get("service", {})
    if not isinstance(service, dict):
        raise CaseError(label, "must be a table ([service])", column="service")
    extra = sorted(set(service) - SERVICE_KEYS)
    if extra:
        warnings.append(f"case.toml: key(s) service.{', service.'.join(extra)} are not used and were ignored")

    def text(table: dict[str, Any], key: str, shown: str, default: str, choices: tuple[str, ...] = ()) -> str:
        value = table.get(key, default)
        if not isinstance(value, str):
            raise CaseError(label, "must be text in quotes", column=shown, value=value)
        if choices and value.lower() not in choices:
            raise CaseError(label, f"must be one of {', '.join(choices)}", column=shown, value=value)
        return value.lower() if choices else value

    def number(
        table: dict[str, Any], key: str, shown: str, default: float | None, strict: bool
    ) -> float | None:
        value = table.get(key, default)
        if value is None:
            return None
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise CaseError(label, "must be a number", column=shown, value=value)
        value = float(value)
        if not math.isfinite(value):
            raise CaseError(label, "must be a finite number", column=shown, value=value)
        if value < 0 or (strict and value == 0):
            raise CaseError(
                label,
                "must be greater than 0" if strict else "must not be negative",
                column=shown,
                value=value,
            )
        return value

    name = text(raw, "name", "name", folder.name) or folder.name
    currency = text(raw, "currency", "currency", "")
    days = number(raw, "days_per_year", "days_per_year", DEFAULT_DAYS_PER_YEAR, strict=True)
    rate = number(raw, "holding_rate", "holding_rate", DEFAULT_HOLDING_RATE, strict=False)
    distribution = text(raw, "distribution", "distribution", DEFAULT_DISTRIBUTION, DISTRIBUTIONS)
    store_model = text(raw, "store_model", "store_model", DEFAULT_STORE_MODEL, STORE_MODELS)
    mode = text(service, "mode", "service.mode", DEFAULT_MODE, MODES)
    basis = text(
        service, "backorder_basis", "service.backorder_basis", DEFAULT_BACKORDER_BASIS, BACKORDER_BASES
    )
    target = number(service, "target", "service.target", None, strict=True)
    if target is not None and not 0.0 < target < 1.0:
        raise CaseError(
            label, "a service target must lie strictly between 0 and 1", column="service.target", value=target
        )
    return Settings(
        name=name,
        currency=currency,
        days_per_year=float(days),
        holding_rate=float(rate),
        mode=mode,
        target=target,
        backorder_basis=basis,
        distribution=distribution,
        store_model=store_model,
    )


# --------------------------------------------------------------------------------------------- the tree


def ancestors(upstream: dict[str, str], site: str) -> list[str]:
    """Sites above ``site``, nearest first.

    Parameters
    ----------
    upstream : dict
        Site -> its upstream site (``""`` for a site supplied by suppliers); must hold no loop.
    site : str
        The site.

    Returns
    -------
    list of str
        The upstream site, its upstream, ... up to the root.

    Examples
    --------
    >>> ancestors({"wh": "", "hub": "wh", "shop": "hub"}, "shop")
    ['hub', 'wh']
    """
    out: list[str] = []
    current = upstream.get(site, "")
    while current:
        out.append(current)
        current = upstream.get(current, "")
    return out


def _check_tree(sites: pd.DataFrame) -> None:
    label = "sites.csv"
    upstream = dict(zip(sites["site"], sites["upstream"], strict=True))
    rows = dict(zip(sites["site"], sites["rownum"], strict=True))
    for site, up in upstream.items():
        if up == site:
            raise CaseError(
                label, "a site cannot be its own upstream", row=int(rows[site]), column="upstream", value=up
            )
    for site in upstream:
        path = [site]
        current = upstream[site]
        while current:
            if current in path:
                loop = path[path.index(current) :] + [current]
                raise CaseError(
                    label,
                    "sites form a cycle: " + " -> ".join(loop),
                    row=int(rows[site]),
                    column="upstream",
                    value=upstream[site],
                )
            path.append(current)
            current = upstream[current]


def stocked_pairs(sites: pd.DataFrame, demand: pd.DataFrame, stocking: pd.DataFrame | None) -> pd.DataFrame:
    """Which sites stock which items: a frame of ``site, item`` (sorted).

    With ``stocking`` given, exactly its rows. Otherwise every (site, item) listed in ``demand`` plus,
    for each, every site above it (a site stocks what the sites it supplies stock).
    """
    if stocking is not None:
        pairs = stocking[["site", "item"]]
    else:
        upstream = dict(zip(sites["site"], sites["upstream"], strict=True))
        own = demand[["site", "item"]]
        parts = [own]
        for site, rows in own.groupby("site", sort=False):  # a loop over sites, each step over whole arrays
            parts += [rows.assign(site=above) for above in ancestors(upstream, str(site))]
        pairs = pd.concat(parts, ignore_index=True).drop_duplicates()
    order = {s: i for i, s in enumerate(sites["site"])}
    pairs = pairs.assign(_o=pairs["site"].map(order)).sort_values(["_o", "item"], kind="stable")
    return pairs.drop(columns="_o").reset_index(drop=True)


# --------------------------------------------------------------------------------------------- history

#: fewest days a history may span (a standard deviation needs two days)
MIN_HISTORY_DAYS = 2
#: a history shorter than this many days gets a warning
SHORT_HISTORY_DAYS = 28


def estimate_from_history(history: pd.DataFrame) -> pd.DataFrame:
    """Daily demand moments per (site, item) from a sales history.

    Days without a sale count as zero over the history's whole date span (first to last date in the file,
    both included). Several lines for the same date, site and item are added up. The moments and the
    intermittency class (ADI / CV², Syntetos & Boylan 2005) come from :func:`models.demand.estimate_demand`.
    Intermittent and lumpy series get a count distribution (Poisson, or negative binomial when the daily
    variance exceeds the mean) in the ``distribution`` column; the others leave it empty so the item's or the
    case's default applies.

    Returns
    -------
    DataFrame
        ``site, item, daily_mean, daily_sd, demand_class, distribution, history_days``.
    """
    from models import demand as md

    start = history["date"].min()
    end = history["date"].max()
    n_days = int((end - start).days) + 1
    totals = history.groupby(["site", "item", "date"], sort=True)["quantity"].sum().reset_index()
    keys = totals[["site", "item"]].drop_duplicates().reset_index(drop=True)
    key_index = pd.MultiIndex.from_frame(keys).get_indexer(pd.MultiIndex.from_frame(totals[["site", "item"]]))
    day_index = (totals["date"] - start).dt.days.to_numpy()
    matrix = np.zeros((len(keys), n_days), dtype=float)
    matrix[key_index, day_index] = totals["quantity"].to_numpy(dtype=float)
    estimate = md.estimate_demand(matrix)
    out = keys.copy()
    mean = np.asarray(estimate.daily_mean, dtype=float)
    sd = np.asarray(estimate.daily_sd, dtype=float)
    classes = np.asarray(estimate.demand_class)
    out["daily_mean"] = mean
    out["daily_sd"] = sd
    out["demand_class"] = [md.CLASS_NAMES[int(c)] for c in classes]
    count = md.choose_distribution(mean, sd * sd, "auto", demand_class=np.full(len(mean), md.INTERMITTENT))
    sporadic = (classes == md.INTERMITTENT) | (classes == md.LUMPY)
    out["distribution"] = np.where(sporadic, [md.DISTRIBUTION_NAMES[int(c)] for c in count], "")
    out["history_days"] = n_days
    return out


# --------------------------------------------------------------------------------------------- policies


def read_policies(
    path: Path, label: str, sites: pd.DataFrame, items: pd.DataFrame, warnings: list[str] | None = None
) -> pd.DataFrame:
    """Read a policies file (``site, item, reorder_point, order_quantity``) and check it against the case.

    Returns the frame with a ``rownum`` column (spreadsheet row of each record).
    """
    frame = _read_csv(path, label, POLICIES_COLUMNS, warnings if warnings is not None else [])
    _check_known(frame, "site", sites["site"], label, "site", "sites.csv")
    _check_known(frame, "item", items["item"], label, "item", "items.csv")
    _check_unique(frame, ["site", "item"], label)
    return frame


# --------------------------------------------------------------------------------------------- load_case


def load_case(path: str | Path) -> Case:
    """Read and validate a case folder.

    Parameters
    ----------
    path : str or Path
        The case folder.

    Returns
    -------
    Case
        Validated tables; optional columns are filled with their documented defaults (NaN where "none").

    Raises
    ------
    CaseError
        Naming the file, row, column and rule of the first problem found.

    Examples
    --------
    >>> case = load_case("cases/quickstart")  # doctest: +SKIP
    >>> case.settings.mode  # doctest: +SKIP
    'cost'
    """
    folder = Path(path)
    if not folder.is_dir():
        raise CaseError(str(folder), "case folder does not exist")
    warnings: list[str] = []
    settings = _read_settings(folder, warnings)

    sites = _read_csv(folder / "sites.csv", "sites.csv", SITES_COLUMNS, warnings)
    if sites.empty:
        raise CaseError("sites.csv", "no sites given", row=2)
    for row in sites.itertuples():
        if not SITE_NAME_PATTERN.match(row.site):
            raise CaseError(
                "sites.csv",
                "site names may hold letters, digits, spaces, '.', '-' and '_' and "
                "must start with a letter or digit (they become folder names)",
                row=row.rownum,
                column="site",
                value=row.site,
            )
    _check_unique(sites, ["site"], "sites.csv")
    _check_known(
        sites, "upstream", sites["site"], "sites.csv", "upstream site", "the site column", allow_empty=True
    )
    _check_tree(sites)
    for rec in sites.itertuples(index=False):
        if rec.upstream:
            if math.isnan(rec.transit_days):
                raise CaseError(
                    "sites.csv",
                    "a site with an upstream needs its transit time",
                    row=int(rec.rownum),
                    column="transit_days",
                )
        else:
            for col in ("transit_days", "delivery_cost"):
                value = getattr(rec, col)
                if not math.isnan(value) and value > 0:
                    raise CaseError(
                        "sites.csv",
                        "only a site with an upstream has a transit time or delivery cost; a site supplied "
                        "straight by suppliers uses the supplier's lead_days and order_cost",
                        row=int(rec.rownum),
                        column=col,
                        value=value,
                    )
            if not math.isnan(rec.transit_days_sd) and rec.transit_days_sd > 0:
                raise CaseError(
                    "sites.csv",
                    "only a site with an upstream has a transit time spread",
                    row=int(rec.rownum),
                    column="transit_days_sd",
                    value=rec.transit_days_sd,
                )
    sites["transit_days"] = sites["transit_days"].fillna(0.0)

    suppliers = _read_csv(folder / "suppliers.csv", "suppliers.csv", SUPPLIERS_COLUMNS, warnings)
    if suppliers.empty:
        raise CaseError("suppliers.csv", "no suppliers given", row=2)
    _check_unique(suppliers, ["supplier"], "suppliers.csv")

    items = _read_csv(folder / "items.csv", "items.csv", ITEMS_COLUMNS, warnings)
    if items.empty:
        raise CaseError("items.csv", "no items given", row=2)
    _check_unique(items, ["item"], "items.csv")
    _check_known(items, "supplier", suppliers["supplier"], "items.csv", "supplier", "suppliers.csv")
    for rec in items.itertuples(index=False):
        holding = (
            rec.holding_cost if not math.isnan(rec.holding_cost) else settings.holding_rate * rec.unit_cost
        )
        if holding <= 0:
            raise CaseError(
                "items.csv",
                "holding cost per unit per year must be greater than 0 (give "
                "holding_cost, or a unit_cost above 0 with holding_rate above 0 in case.toml)",
                row=int(rec.rownum),
                column="holding_cost" if not math.isnan(rec.holding_cost) else "unit_cost",
                value=rec.holding_cost if not math.isnan(rec.holding_cost) else rec.unit_cost,
            )

    demand_path, history_path = folder / "demand.csv", folder / "history.csv"
    if demand_path.is_file() and history_path.is_file():
        raise CaseError("demand.csv", "give either demand.csv or history.csv, not both")
    if history_path.is_file():
        history = _read_csv(history_path, "history.csv", HISTORY_COLUMNS, warnings)
        if history.empty:
            raise CaseError("history.csv", "no sales lines given", row=2)
        _check_known(history, "site", sites["site"], "history.csv", "site", "sites.csv")
        _check_known(history, "item", items["item"], "history.csv", "item", "items.csv")
        span = int((history["date"].max() - history["date"].min()).days) + 1
        if span < MIN_HISTORY_DAYS:
            last = history.loc[history["date"].idxmax()]
            raise CaseError(
                "history.csv",
                f"the dates must span at least {MIN_HISTORY_DAYS} days",
                row=int(last["rownum"]),
                column="date",
                value=str(last["date"].date()),
            )
        if span < SHORT_HISTORY_DAYS:
            warnings.append(
                f"history.csv covers only {span} days; estimates from so short a history are rough"
            )
        demand = estimate_from_history(history)
        source = "history.csv"
        demand["rownum"] = 0
    elif demand_path.is_file():
        demand = _read_csv(demand_path, "demand.csv", DEMAND_COLUMNS, warnings)
        _check_known(demand, "site", sites["site"], "demand.csv", "site", "sites.csv")
        _check_known(demand, "item", items["item"], "demand.csv", "item", "items.csv")
        _check_unique(demand, ["site", "item"], "demand.csv")
        demand["demand_class"] = ""
        demand["distribution"] = ""
        source = "demand.csv"
    else:
        raise CaseError("demand.csv", "file is missing (give demand.csv, or history.csv to estimate it)")

    stocking = None
    if (folder / "stocking.csv").is_file():
        stocking = _read_csv(folder / "stocking.csv", "stocking.csv", STOCKING_COLUMNS, warnings)
        _check_known(stocking, "site", sites["site"], "stocking.csv", "site", "sites.csv")
        _check_known(stocking, "item", items["item"], "stocking.csv", "item", "items.csv")
        _check_unique(stocking, ["site", "item"], "stocking.csv")
        _check_stocking(stocking, sites, demand, warnings)

    pairs = stocked_pairs(sites, demand, stocking)
    idle = [site for site in sites["site"] if site not in set(pairs["site"])]
    if idle:
        warnings.append(
            f"site(s) {', '.join(idle)} stock no item (no demand there or below, and no "
            "stocking.csv row): nothing is planned for them"
        )
    _check_service(settings, items, stocking, pairs, warnings)

    policies = None
    if (folder / "policies.csv").is_file():
        policies = read_policies(folder / "policies.csv", "policies.csv", sites, items, warnings)
        _check_policies_stocked(policies, pairs, "policies.csv", require_all=False, warnings=warnings)
        _check_policies_quantity(policies, sites, demand, "policies.csv")

    def clean(frame: pd.DataFrame | None) -> pd.DataFrame | None:
        if frame is None:
            return None
        return frame.drop(columns="rownum").reset_index(drop=True)

    tables = {
        "sites.csv": sites,
        "suppliers.csv": suppliers,
        "items.csv": items,
        "stocking.csv": stocking,
        "policies.csv": policies,
    }
    rows = {name: [int(r) for r in frame["rownum"]] for name, frame in tables.items() if frame is not None}
    return Case(
        rows=rows,
        path=folder,
        settings=settings,
        sites=clean(sites),
        suppliers=clean(suppliers),
        items=clean(items),
        demand=clean(demand),
        stocking=clean(stocking),
        policies=clean(policies),
        warnings=warnings,
        demand_source=source,
    )


def _check_stocking(
    stocking: pd.DataFrame, sites: pd.DataFrame, demand: pd.DataFrame, warnings: list[str]
) -> None:
    """A site stocking an item needs its upstream to stock it too; demand at unstocked item-sites is noted."""
    upstream = dict(zip(sites["site"], sites["upstream"], strict=True))
    stocked = set(zip(stocking["site"], stocking["item"], strict=True))
    for rec in stocking.itertuples(index=False):
        up = upstream[rec.site]
        if up and (up, rec.item) not in stocked:
            raise CaseError(
                "stocking.csv",
                f"site {rec.site!r} stocks this item but its upstream {up!r} does "
                "not; add a stocking.csv row for the upstream",
                row=int(rec.rownum),
                column="item",
                value=rec.item,
            )
    lost = [
        (s, i)
        for s, i, m in zip(demand["site"], demand["item"], demand["daily_mean"], strict=True)
        if (s, i) not in stocked and m > 0
    ]
    if lost:
        shown = ", ".join(f"{s}/{i}" for s, i in lost[:5]) + (" ..." if len(lost) > 5 else "")
        warnings.append(
            f"{len(lost)} item-site(s) have demand but are not in stocking.csv; their demand is "
            f"left out of the plan: {shown}"
        )


def _check_service(
    settings: Settings,
    items: pd.DataFrame,
    stocking: pd.DataFrame | None,
    pairs: pd.DataFrame,
    warnings: list[str],
) -> None:
    """Every stocked item-site needs a backorder cost (cost mode) or a target (service modes)."""
    if settings.mode == "cost":
        item_cost = dict(zip(items["item"], items["backorder_cost"], strict=True))
        item_row = dict(zip(items["item"], items["rownum"], strict=True))
        if stocking is None:
            for item in pairs["item"].unique():
                if math.isnan(item_cost[item]):
                    raise CaseError(
                        "items.csv",
                        "service mode 'cost' needs a backorder_cost for every stocked "
                        "item (or set [service] mode to cycle_service or fill_rate with a target)",
                        row=int(item_row[item]),
                        column="backorder_cost",
                    )
        else:
            for rec in stocking.itertuples(index=False):
                if math.isnan(rec.backorder_cost) and math.isnan(item_cost[rec.item]):
                    raise CaseError(
                        "stocking.csv",
                        "service mode 'cost' needs a backorder_cost here or in items.csv",
                        row=int(rec.rownum),
                        column="backorder_cost",
                    )
            if stocking["target"].notna().any():
                warnings.append(
                    "stocking.csv gives targets, but [service] mode is 'cost': targets are not used"
                )
    else:
        if settings.target is None:
            if stocking is None:
                raise CaseError(
                    "case.toml", f"service mode '{settings.mode}' needs a target", column="service.target"
                )
            missing = stocking[stocking["target"].isna()]
            if not missing.empty:
                raise CaseError(
                    "stocking.csv",
                    f"service mode '{settings.mode}' needs a target here or service.target in case.toml",
                    row=int(missing["rownum"].iloc[0]),
                    column="target",
                )


def _check_policies_quantity(
    policies: pd.DataFrame, sites: pd.DataFrame, demand: pd.DataFrame, label: str
) -> None:
    """An order quantity of 0 is accepted only where no demand passes through the item-site."""
    zero = policies[policies["order_quantity"] <= 0]
    if zero.empty:
        return
    upstream = dict(zip(sites["site"], sites["upstream"], strict=True))
    busy: set[tuple[str, str]] = set()
    for site, item, mean in zip(demand["site"], demand["item"], demand["daily_mean"], strict=True):
        if mean > 0:
            busy.add((site, item))
            busy.update((above, item) for above in ancestors(upstream, site))
    for rec in zero.itertuples(index=False):
        if (rec.site, rec.item) in busy:
            raise CaseError(
                label,
                "must be greater than 0 where there is demand",
                row=int(rec.rownum),
                column="order_quantity",
                value=rec.order_quantity,
            )


def _check_policies_stocked(
    policies: pd.DataFrame, pairs: pd.DataFrame, label: str, *, require_all: bool, warnings: list[str]
) -> None:
    stocked = set(zip(pairs["site"], pairs["item"], strict=True))
    given = set()
    for rec in policies.itertuples(index=False):
        if (rec.site, rec.item) not in stocked:
            raise CaseError(
                label,
                f"item {rec.item!r} is not stocked at site {rec.site!r} in this case",
                row=int(rec.rownum),
                column="item",
                value=rec.item,
            )
        given.add((rec.site, rec.item))
    missing = [p for p in zip(pairs["site"], pairs["item"], strict=True) if p not in given]
    if missing and require_all:
        site, item = missing[0]
        raise CaseError(
            label,
            f"no policy for stocked item {item!r} at site {site!r} "
            f"({len(missing)} stocked item-site(s) missing)",
            column="item",
            value=item,
        )
    if missing:
        warnings.append(
            f"{label}: {len(missing)} stocked item-site(s) have no current policy; today's totals "
            "cover only the item-sites given"
        )


def load_policies_for_case(case: Case, path: str | Path) -> pd.DataFrame:
    """Read a policies file for ``rqnet evaluate``: every stocked item-site needs exactly one row."""
    file = Path(path)
    label = file.name
    frame = read_policies(file, label, case.sites, case.items)
    pairs = stocked_pairs(case.sites, case.demand, case.stocking)
    _check_policies_stocked(frame, pairs, label, require_all=True, warnings=[])
    _check_policies_quantity(frame, case.sites, case.demand, label)
    rows = [int(r) for r in frame["rownum"]]
    out = frame.drop(columns="rownum").reset_index(drop=True)
    out.attrs["rows"] = rows
    return out
