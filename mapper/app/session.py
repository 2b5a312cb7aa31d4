"""A session: the store opened once for one command, and what is built from it, built once.

Every command runs inside one :class:`Session`. It opens the store on first use (read-only
unless the command writes), resolves which campaign is meant (refusing to guess when the
store holds several and none is named), and caches the campaign rows, the operating map,
the verdict and the comparisons, so a command that needs the map three times builds it once.

The analysis (and numpy and pandas with it) is loaded by the methods that build from it,
not by this module: ``mapper params`` reads plain rows (:meth:`Session.param_rows`) and
starts without any of them.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

from mapper.errors import MapperError, NotFoundError, UsageError
from mapper.store.curation import Curation, curated_rows, upgrade
from mapper.store.database import SCHEMA_VERSION, Store
from mapper.store.queries import param_rows

if TYPE_CHECKING:
    import pandas as pd

    from mapper.analysis.opmap import OperatingMap
    from mapper.analysis.verdict import Verdict

AGAINST = {"level": "level", "input": "input_level"}


def finite_or_none(value) -> float | None:
    """``value`` as a float, or None when it is missing, not a number or not finite."""
    try:
        value = float(value)
    except (TypeError, ValueError):
        return None
    return value if math.isfinite(value) else None


def parameter_units(units: dict) -> dict[str, str]:
    """Unit of each reported quantity, from the campaign's input and output units.

    Times are stored in seconds whatever the data files used, so time constant and dead
    time are always in s. A unit the campaign does not give is left out.
    """
    found = {"time_constant": "s", "dead_time": "s"}
    input_unit, output_unit = units.get("input") or "", units.get("output") or ""
    if input_unit and output_unit:
        found["gain"] = f"{output_unit}/{input_unit}"
        found["gain_over_time_constant"] = f"{output_unit}/{input_unit}/s"
    if output_unit:
        found["level"] = output_unit
    if input_unit:
        found["input_step"] = input_unit
    return found


def campaign_units(info: dict) -> dict[str, str]:
    """Input and output units of a campaign row (blank when not given)."""
    return {"input": info.get("input_unit") or "", "output": info.get("output_unit") or ""}


@dataclass(frozen=True)
class CampaignRows:
    """Plain rows of one campaign's tests (dicts, as :func:`mapper.store.queries.param_rows`
    gives them, with the curation columns), its name and units."""

    name: str
    rows: list[dict]
    units: dict

    @property
    def parameter_units(self) -> dict[str, str]:
        return parameter_units(self.units)


@dataclass
class CampaignData:
    """One campaign's rows of the store's params (excluded tests included, marked), its
    units, instrument ranges and description."""

    name: str
    params: pd.DataFrame
    units: dict
    ranges: dict
    description: str = ""
    note: str = ""
    info: dict = field(default_factory=dict)

    @property
    def included(self) -> pd.DataFrame:
        """The rows the map, comparisons and verdict use: excluded tests left out."""
        if "excluded" not in self.params.columns:
            return self.params
        keep = ~self.params["excluded"].fillna(False).astype(bool)
        return self.params.loc[keep].reset_index(drop=True)

    @property
    def parameter_units(self) -> dict[str, str]:
        return parameter_units(self.units)


def campaign_data(store: Store, info: dict) -> CampaignData:
    """The rows, units and ranges of the campaign described by ``info`` (a campaign row)."""
    params = store.params(campaign=info["name"])  # with the curation columns
    units = campaign_units(info)
    ranges = {}
    for side in ("input", "output"):
        low, high = finite_or_none(info.get(f"{side}_range_low")), finite_or_none(info.get(f"{side}_range_high"))
        if low is not None and high is not None:
            ranges[side] = [low, high]
    description = info.get("description") or ""
    description = description if isinstance(description, str) else ""
    return CampaignData(info["name"], params, units, ranges, description, info=info)


class Session:
    """The store of one command, opened once, and a cache of what is built from it.

    Parameters
    ----------
    path : str or Path, optional
        The store (default ``$MAPPER_DB`` or ``mapper.duckdb``).
    write : bool, default False
        Open for writing. Only ``import`` also creates a store (``create=True``); every
        other command finds a missing store an error and creates nothing.
    create : bool, default False
        Create the store when missing (writing sessions only).
    store : Store, optional
        An already open store to work on (its owner closes it).
    """

    def __init__(self, path: str | Path | None = None, *, write: bool = False, create: bool = False,
                 store: Store | None = None) -> None:
        self.path = path
        self.write = write
        self.create = create
        self._store = store
        self._owned = store is None
        self._cache: dict[tuple, Any] = {}

    # -- the store, opened once -----------------------------------------------------------
    @property
    def store(self) -> Store:
        if self._store is None:
            self._store = Store(self.path, read_only=not self.write, create=self.create)
            if self.write:  # an older store gains this schema's tables when opened for writing
                upgrade(self._store.connection, SCHEMA_VERSION)
        return self._store

    @property
    def curation(self) -> Curation:
        """Exclusions and notes of the store."""
        return Curation(self.store.connection)

    def close(self) -> None:
        if self._store is not None and self._owned:
            self._store.close()
        self._store = None
        self._cache.clear()

    def __enter__(self) -> Session:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def forget(self) -> None:
        """Drop what was built (after the store changed, e.g. a fit or an exclusion)."""
        self._cache.clear()

    def _cached(self, key: tuple, build):
        if key not in self._cache:
            self._cache[key] = build()
        return self._cache[key]

    # -- campaigns ------------------------------------------------------------------------
    def campaigns(self) -> list[dict]:
        """Every campaign row of the store, oldest first."""
        return self._cached(("campaigns",), self.store.campaign_info)

    def campaign_names(self) -> list[str]:
        return [c["name"] for c in self.campaigns()]

    def campaign_info(self, name: str | None) -> dict:
        """The campaign named ``name``; with none named, the only one.

        Raises
        ------
        NotFoundError
            The store holds no campaign, or none of that name.
        UsageError
            The store holds several campaigns and none was named (the command line exits 2).
        """
        campaigns = self.campaigns()
        where = self.store.path
        if not campaigns:
            raise NotFoundError(f"{where}: the store holds no campaign yet",
                                hint="run 'mapper import FOLDER' and 'mapper fit' first")
        names = ", ".join(repr(c["name"]) for c in campaigns)
        if name is None:
            if len(campaigns) == 1:
                return campaigns[0]
            listing = "".join(f"\n    {c['name']}" for c in campaigns)
            raise UsageError(f"{where} holds {len(campaigns)} campaigns and none was named; "
                             f"the campaigns stored:{listing}",
                             hint="name one with --campaign NAME (quote a name with spaces)")
        for info in campaigns:
            if info["name"] == name:
                return info
        raise NotFoundError(f"campaign '{name}' is not in {where}", hint=f"campaigns stored: {names}")

    def data(self, name: str | None = None) -> CampaignData:
        """Rows, units and ranges of the named campaign (read once per session)."""
        info = self.campaign_info(name)
        return self._cached(("data", info["name"]), lambda: campaign_data(self.store, info))

    def param_rows(self, name: str | None = None, *, level_min: float | None = None,
                   level_max: float | None = None, direction: str | None = None) -> CampaignRows:
        """The named campaign's tests as plain rows (excluded ones included, marked), read
        without pandas: those at a level from ``level_min`` to ``level_max`` moving in
        ``direction`` when given (a test without a level is left out by a level bound)."""
        info = self.campaign_info(name)
        rows = param_rows(self.store, campaign=info["name"])
        if level_min is not None:
            rows = [row for row in rows if row["level"] is not None and row["level"] >= level_min]
        if level_max is not None:
            rows = [row for row in rows if row["level"] is not None and row["level"] <= level_max]
        if direction is not None:
            rows = [row for row in rows if row["direction"] == direction]
        return CampaignRows(info["name"], curated_rows(self.store.connection, rows), campaign_units(info))

    def fitted_data(self, name: str | None = None) -> CampaignData:
        """As :meth:`data`, refusing a campaign without any fitted test."""
        data = self.data(name)
        if data.params["quality"].isna().all():
            raise MapperError(f"campaign '{data.name}' has no fitted tests",
                              hint=f"run 'mapper fit --campaign \"{data.name}\"' first")
        if data.included["quality"].isna().all():
            raise MapperError(f"campaign '{data.name}': every fitted test is excluded",
                              hint="bring tests back with 'mapper include ID...'")
        return data

    # -- what is built from a campaign -----------------------------------------------------
    def operating_map(self, name: str | None = None, *, against: str = "level",
                      influence: bool = True) -> tuple[CampaignData, OperatingMap]:
        """The operating map of a campaign's included tests (built once per session).

        With ``influence`` (default) the map also carries the single tests its conclusions
        hang on (:func:`mapper.analysis.influence.with_influence`).
        """
        from mapper.analysis.influence import with_influence
        from mapper.analysis.opmap import build_map
        if against not in AGAINST:
            raise MapperError(f"cannot map against '{against}'", hint="use level or input")
        data = self.fitted_data(name)

        rows = data.included
        if against == "input":
            rows = rows.copy()
            levels = self._cached(("input_levels",), self.store.input_levels)
            rows["input_level"] = [levels.get(int(i), math.nan) for i in rows["test_id"]]
        opmap = self._cached(("map", data.name, against), lambda: build_map(rows, against=AGAINST[against]))
        if not influence:
            return data, opmap
        return data, self._cached(("map+influence", data.name, against),
                                  lambda: with_influence(opmap, rows))

    def verdict(self, name: str | None = None, *, ms_max: float = 2.0, slowdown_max: float = 2.0,
                closed_loop_time: float | None = None, rule: str = "simc") -> tuple[CampaignData, Verdict]:
        """Single controller or schedule for a campaign's included tests (decided once)."""
        from mapper.analysis.influence import verdict_influence
        from mapper.analysis.verdict import decide
        data, opmap = self.operating_map(name)

        def build() -> Verdict:
            verdict = decide(data.included, ms_max=ms_max, slowdown_max=slowdown_max,
                             closed_loop_time=closed_loop_time, ranges=data.ranges or None, rule=rule,
                             opmap=opmap)
            depends = verdict_influence(data.included, decision=verdict.decision, opmap=opmap,
                                        ms_max=ms_max, slowdown_max=slowdown_max,
                                        closed_loop_time=closed_loop_time, ranges=data.ranges or None,
                                        rule=rule)
            return replace(verdict, depends_on=depends.entries, depends_on_sentence=depends.sentence)
        key = ("verdict", data.name, ms_max, slowdown_max, closed_loop_time, rule)
        return data, self._cached(key, build)

    def comparisons(self, name: str | None = None) -> list[dict]:
        """Repeats and up-against-down comparisons inside one campaign (included tests)."""
        from mapper.analysis.compare import compare_directions, compare_repeats
        data = self.fitted_data(name)
        return self._cached(("comparisons", data.name), lambda: (
            compare_repeats(data.included) + compare_directions(data.included)))

    def compare_two(self, first: str, second: str) -> list[dict]:
        """Campaign ``first`` against ``second``: which parameters moved, where, how much."""
        from mapper.analysis.compare import compare_campaigns
        from mapper.analysis.opmap import build_map
        a, b = self.fitted_data(first), self.fitted_data(second)

        def level_map(data: CampaignData) -> OperatingMap:  # shared with operating_map's cache
            return self._cached(("map", data.name, "level"), lambda: build_map(data.included, against="level"))
        return self._cached(("compare", a.name, b.name), lambda: compare_campaigns(
            a.included, b.included, names=(a.name, b.name), maps=(level_map(a), level_map(b))))

    def test_row(self, test_id: int) -> dict:
        """The params row of one test (with its campaign's curation columns)."""
        self.known_tests([test_id])
        for info in self.campaigns():
            rows = self.data(info["name"]).params
            found = rows[rows["test_id"] == int(test_id)]
            if len(found):
                return found.iloc[0].to_dict()
        raise NotFoundError(f"no test {test_id} in {self.store.path}")

    def test_ids_of(self, name: str | None) -> list[int]:
        """Every test id of a campaign (read without loading its rows)."""
        return self.store.test_ids(campaign=self.campaign_info(name)["name"])

    def known_tests(self, test_ids: Sequence[int]) -> list[int]:
        """``test_ids`` checked against the store (a missing id is an error naming it)."""
        stored = set(self.store.test_ids())
        missing = [i for i in test_ids if i not in stored]
        if missing:
            raise NotFoundError(f"no test {', '.join(map(str, missing))} in {self.store.path}",
                                hint="'mapper params --campaign NAME' lists the test ids")
        return list(dict.fromkeys(int(i) for i in test_ids))
