"""Results as pandas DataFrames: a report's rows in one call, with areas in the unit asked for.

Every job's report has ``to_dataframe(units="km2")`` (:class:`~areamc.area.AreaReport`,
:class:`~areamc.overlap.OverlapReport`, :class:`~areamc.coverage.CoverageReport`,
:class:`~areamc.integrate.IntegrateReport`), which calls :func:`to_dataframe` here.  A frame
has one row per row record and one column per field, in the record's order, holding what the
command line's JSON ``results`` hold for the same run and ``--units``: the same row dicts
(``to_dict()``) converted by the same function (:func:`areamc.output.convert_rows`) over the
same fields.  Which fields hold an area (m² of the equal-area plane, divided by the unit's m²)
or a density per m² (multiplied by it) is listed once, next to each job's row records
(``area.AREA_FIELDS``, ``integrate.PER_AREA_FIELDS``, ...); :data:`TABLES` gathers those
lists, and the command line reads its unit conversion from them too (:func:`table_columns`).

``df.attrs["units"]`` records the unit and ``df.attrs["metadata"]`` the run's metadata
(``report.metadata()``: plane, confidence, seed, sampler, stop rule, versions).  Shares,
counts and z scores are unitless and never converted; coordinates play no part here.

pandas is an optional dependency (``pip install 'areamc[dataframe]'``), imported only when a
frame is built.
"""

from __future__ import annotations

import copy
from dataclasses import dataclass, fields as dataclass_fields
from typing import Sequence

from .area import AREA_FIELDS as _AREA_FIELDS, AreaReport, AreaRow, TraceRow
from .coverage import AREA_FIELDS as _COVERAGE_AREA_FIELDS, CoverageReport, CoverageRow, PopulationShare
from .errors import OptionError
from .integrate import AREA_FIELDS as _INTEGRATE_AREA_FIELDS, PER_AREA_FIELDS, IntegrateReport, IntegrateRow
from .output import Column, convert_rows
from .overlap import AREA_FIELDS as _OVERLAP_AREA_FIELDS, PROFILE_AREA_FIELDS, MultiplicityRow, OverlapReport, OverlapRow
from .units import area_factor

__all__ = ["Table", "TABLES", "PANDAS_HINT", "to_dataframe", "table_columns"]

#: How to get pandas, named in the ImportError when it is missing.
PANDAS_HINT = "pip install 'areamc[dataframe]'"


@dataclass(frozen=True)
class Table:
    """One table of a report: where its row records are, their fields, and which hold areas.

    Attributes
    ----------
    source : str
        The report attribute holding the records (``"rows"``), or its method giving them
        (``"trace_rows"``).
    record : type
        The frozen row record (a dataclass with ``to_dict()``).
    area : tuple of str
        Fields holding an area in m² of the equal-area plane.
    per_area : tuple of str
        Fields holding a density per m² (a count per m²).
    nested : tuple of (str, type)
        Fields holding a record whole (coverage's ``population``, a
        :class:`~areamc.coverage.PopulationShare`), whose ``to_dict()`` fields the row's dict
        gives after its own.
    """

    source: str
    record: type
    area: tuple[str, ...]
    per_area: tuple[str, ...] = ()
    nested: tuple[tuple[str, type], ...] = ()

    @property
    def own_fields(self) -> tuple[str, ...]:
        """The record's own fields, in its order (the nested ones left out)."""
        skip = {name for name, _ in self.nested}
        return tuple(f.name for f in dataclass_fields(self.record) if f.name not in skip)

    @property
    def fields(self) -> tuple[str, ...]:
        """Every field a row's ``to_dict()`` can give, in its order (nested records' fields last)."""
        out = list(self.own_fields)
        for _, part in self.nested:  # a record of Nones: only the keys of its to_dict() are used
            out += [key for key in part(**{f.name: None for f in dataclass_fields(part)}).to_dict() if key not in out]
        return tuple(out)

    def columns(self) -> tuple[Column, ...]:
        """A :class:`~areamc.output.Column` per field, marked area or per-area: what
        :func:`~areamc.output.convert_rows` needs to put the rows in an output unit."""
        return tuple(Column(name, area=name in self.area, per_area=name in self.per_area) for name in self.fields)

    def records(self, report) -> Sequence:
        """The row records of `report` this table holds."""
        value = getattr(report, self.source)
        return value() if callable(value) else value


#: The tables of each report, by the name `which` takes: ``"rows"`` always; the area job's
#: running estimates (``"trace"``) and the overlap job's multiplicity profile (``"profile"``).
TABLES: dict[type, dict[str, Table]] = {
    AreaReport: {
        "rows": Table("rows", AreaRow, _AREA_FIELDS),
        "trace": Table("trace_rows", TraceRow, _AREA_FIELDS),
    },
    OverlapReport: {
        "rows": Table("rows", OverlapRow, _OVERLAP_AREA_FIELDS),
        "profile": Table("multiplicity", MultiplicityRow, PROFILE_AREA_FIELDS),
    },
    CoverageReport: {"rows": Table("rows", CoverageRow, _COVERAGE_AREA_FIELDS, nested=(("population", PopulationShare),))},
    IntegrateReport: {"rows": Table("rows", IntegrateRow, _INTEGRATE_AREA_FIELDS, PER_AREA_FIELDS)},
}


def _table(report_type: type, which: str) -> Table:
    for known, tables in TABLES.items():
        if issubclass(report_type, known):
            if which not in tables:
                raise OptionError(f"{{param}}: {known.__name__} has no table {which!r}; choose one of "
                                  f"{', '.join(tables)}", param="which")
            return tables[which]
    raise OptionError(f"{{param}}: expected an areamc report ({', '.join(t.__name__ for t in TABLES)}), "
                      f"got {report_type.__name__}", param="report")


def table_columns(report_type: type, which: str = "rows") -> tuple[Column, ...]:
    """The columns of a report type's table (`which`), each marked area or per-area (see :class:`Table`).

    The command line converts its CSV, JSON and feature output with these, so a frame and a
    file of the same run hold the same numbers.  No unit or CRS is involved here.
    """
    return _table(report_type, which).columns()


def _pandas():
    try:
        import pandas
    except ImportError as err:
        raise ImportError(f"results as DataFrames need pandas, an optional dependency of areamc: {PANDAS_HINT}") \
            from err
    return pandas


def to_dataframe(report, units: str = "km2", *, which: str = "rows"):
    """A report's rows as a pandas DataFrame, areas in `units`.

    Parameters
    ----------
    report : AreaReport, OverlapReport, CoverageReport or IntegrateReport
        Areas in its rows are m² of the equal-area plane its ``run.plane`` names (geodesic
        areas m² on WGS84); densities are counts per m².
    units : str
        Unit of the area columns: ``m2``, ``ha``, ``km2`` (default), ``acre`` or ``mi2``
        (:mod:`areamc.units`; the acre and square mile of NIST Handbook 44, Appendix C).
        Per-area columns (integrate's ``mean_density``) become counts per `units`.
    which : str
        The table: ``"rows"`` (default); ``"trace"`` for an area report's running estimates
        (empty unless it was run with ``trace_every``); ``"profile"`` for an overlap report's
        multiplicity profile.

    Returns
    -------
    pandas.DataFrame
        One row per record, one column per field in the record's order (the fields of
        docs/output.md; a coverage report with a density adds the ``population_*`` fields), the
        values the JSON output holds for the same run (None there is None or NaN here).
        ``attrs["units"]`` is `units`; ``attrs["metadata"]`` a copy of ``report.metadata()``.

    Raises
    ------
    OptionError
        For an unknown unit (parameter ``units``), table (``which``) or a value that is no report
        (``report``).
    ImportError
        When pandas is not installed (the message says how to install it).
    """
    table = _table(type(report), which)
    area_factor(units)  # refuses an unknown unit before any work
    pandas = _pandas()
    rows = convert_rows([record.to_dict() for record in table.records(report)], table.columns(), units)
    columns = list(table.fields)
    for row in rows:  # a key the record type does not list (none today) keeps its place, after the others
        columns += [key for key in row if key not in columns]
    # the columns the rows have (coverage's population_* only with a density); an empty table has the record's own
    present = [name for name in columns if any(name in row for row in rows)] if rows else list(table.own_fields)
    frame = pandas.DataFrame(rows, columns=present)
    frame.attrs["units"] = units
    frame.attrs["metadata"] = copy.deepcopy(report.metadata())
    return frame
