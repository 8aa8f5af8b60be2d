"""swarmaudit from Python: open a run in a notebook, get the tables, the gate, views and movies.

>>> import swarmaudit as sa
>>> run = sa.open_run("runs/case7", domain=(0, 1, 0, 1), cells=(64, 64), blocks=(4, 4))
>>> run.census().head()          # the rows of census.csv
>>> run.check(rtol=1e-3)         # the gate of ``swarmaudit check``
>>> run.view()                   # the dashboard, inline in JupyterLab or the classic notebook

Every method calls the functions the commands call (``audit.tables`` for the
tables and the gate, ``app.export`` and ``app.movie`` for files, the
dashboard's own classes for views), so a notebook, the CLI and the server
give the same numbers. Bad input raises the same one-sentence
``InputError``/``OptionError`` the command line prints.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

import pandas as pd

from ..core.errors import InputError, OptionError
from .options import RUN_OPTIONS, context_from_options
from .view_policy import DEFAULT_CMAP, DEFAULT_SCALING

__all__ = ["open_run", "AuditedRun", "CheckOutcome", "CompareOutcome"]

#: ``view(which)``: the whole dashboard, one particle view, or one side panel
VIEWS = ("dashboard", "space", "phase", "blocks", "migration", "drift", "histogram", "compare")


def open_run(path, **options) -> "AuditedRun":
    """Open a run for auditing from Python.

    Parameters
    ----------
    path : str, path or list
        A folder of snapshots, a glob, or a list of snapshot files (as ``RUN``
        on the command line).
    **options
        The command-line run options by name, without dashes, as text or
        Python values: ``domain=(0, 1, 0, 1)`` or ``domain="0,1,0,1"``,
        ``cells=(64, 64)``, ``blocks=(4, 4)``, ``ranks=4``,
        ``layout="layout.csv"``, ``periodic="x"`` or ``("x", "y")``,
        ``roles={"weight": "macro_w"}`` (or ``role=["weight=macro_w"]``),
        ``roles="roles.toml"`` (a roles file, as ``--roles``), ``id="id,cpu"``,
        ``species="beam_a"``,
        ``engine="auto"|"memory"|"dask"``, ``scheduler="tcp://host:8786"``,
        ``no_cache=True``, ``relativistic=True``, ``c=1.0``.

    Returns
    -------
    AuditedRun
        The run, with ``snapshots``, ``frame()``, ``census()``, ``migration()``,
        ``migration_summary()``, ``drift()``, ``check()``, ``export()``,
        ``movie()`` and ``view()``.

    Raises
    ------
    swarmaudit.core.errors.InputError, swarmaudit.core.errors.OptionError
        A file that cannot be used or an option that does not make sense, in
        one sentence (what the command line prints before exiting with 2).
    """
    ctx = context_from_options(None, run=path, **options)
    # files named by options are inputs too: the export must never write over them
    files = {"layout": options.get("layout"),
             "roles_file": options.get("roles_file") or options.get("map") or
             (options.get("roles") if isinstance(options.get("roles"), (str, os.PathLike)) else None)}
    return AuditedRun(ctx, {k: os.fspath(v) for k, v in files.items() if v is not None})


@dataclass
class CheckOutcome:
    """What ``check`` decided: ``passed``, the ``failures`` and the judged ``table``.

    ``failures`` lists, earliest first, every total that left the band (its
    quantity, species, the first snapshot out, value, reference, drift in per
    cent); ``table`` has one row per judged total (largest drift, where, first
    snapshot out, status). ``lines`` is the text ``swarmaudit check`` prints.
    """

    passed: bool
    rtol: float
    failures: pd.DataFrame
    table: pd.DataFrame
    lines: list[str] = field(default_factory=list)

    def __bool__(self) -> bool:
        return self.passed

    def __repr__(self) -> str:
        return "\n".join(self.lines) if self.lines else f"CheckOutcome(passed={self.passed})"

    def _repr_html_(self) -> str:
        import html
        colour = "#1f7a4d" if self.passed else "#a4262c"
        word = "passed" if self.passed else "failed"
        head = html.escape(self.lines[0]) if self.lines else ""
        return (f"<div style='border-left:6px solid {colour};padding:4px 10px'>"
                f"<b>check {word}</b> (rtol {self.rtol:g}): {head}</div>"
                + self.table.to_html(index=False, na_rep="–"))


@dataclass
class CompareOutcome:
    """What ``compare`` found: ``passed`` (the gate), the ``compare_*`` tables and the summary.

    ``tables`` maps each ``compare_*.csv`` name to its DataFrame (also as
    ``particles``, ``distributions``, ``census``, ``totals``, ``worst``);
    ``failures`` lists what left a tolerance; ``lines`` is what
    ``swarmaudit compare`` prints.
    """

    passed: bool
    comparison: object
    failures: pd.DataFrame
    lines: list[str] = field(default_factory=list)

    @property
    def tables(self) -> dict:
        return self.comparison.tables()

    def __getattr__(self, name):
        if name in ("particles", "distributions", "census", "totals", "worst", "pairing", "notes"):
            return getattr(self.comparison, name)
        raise AttributeError(name)

    def __bool__(self) -> bool:
        return self.passed

    def __repr__(self) -> str:
        return "\n".join(self.lines) if self.lines else f"CompareOutcome(passed={self.passed})"


class AuditedRun:
    """One opened run: its snapshots, frames, audit tables, gate, views and movies.

    Made by :func:`swarmaudit.open_run`. Tables are the DataFrames the
    export writes as CSV (same columns, same rows); results are computed once
    and kept (and in the on-disk cache unless ``no_cache=True``).
    """

    def __init__(self, ctx, input_options: dict | None = None):
        self.ctx = ctx
        self._inputs = dict(input_options or {})
        self._migration = None
        self._server = None
        self._last_dashboard = None

    # what is in it ------------------------------------------------------------------
    @property
    def name(self) -> str:
        """The run's name (its folder's name)."""
        from .view_policy import run_name
        return run_name(self.ctx)

    @property
    def species(self) -> list[str]:
        """The species audited (all of the run's, or those named with ``species=``)."""
        return self.ctx.species_names()

    @property
    def notes(self) -> list[str]:
        """What the audit noticed on the way (snapshots skipped, a guessed layout, ...)."""
        return list(self.ctx.notes)

    def __len__(self) -> int:
        return len(self.ctx.run)

    def __repr__(self) -> str:
        n = len(self)
        return (f"<swarmaudit run '{self.name}': {n} snapshot{'s' if n != 1 else ''}, "
                f"species {', '.join(self.species)}>")

    @property
    def snapshots(self) -> pd.DataFrame:
        """One row per snapshot: position, label, step, time and particles per species."""
        from .inspect_cmd import describe_snapshots
        rows = describe_snapshots(self.ctx)
        table = pd.DataFrame([{"snapshot": r["snapshot"], "label": r["label"], "step": r["step"],
                               "time": r["time"],
                               **{f"count_{s}": r["count"].get(s, 0) for s in self.species},
                               "count": sum(r["count"].values())} for r in rows])
        return table.astype({"step": "Int64"}) if len(table) else table

    def layout(self, i: int = 0):
        """The block layout in force at snapshot ``i`` (a ``BlockLayout``)."""
        return self.ctx.layout(self._position(i))

    def _position(self, i) -> int:
        from .export import select_snapshots
        return select_snapshots(str(int(i)), len(self))[0]

    # particles ----------------------------------------------------------------------
    def frame(self, i: int, species: str | None = None, columns=None):
        """The particles of snapshot ``i`` as a DataFrame (``columns``: only these).

        ``species`` is a species name; with several species and none named,
        every audited species is joined and a ``species`` column says which
        is which. A frame whose columns would not fit comfortably in memory
        (or ``engine="dask"``) comes back as a lazy dask DataFrame, one
        partition per row piece, read only when computed.
        """
        from ..engine.dask_backend import frame_to_dask, use_dask
        i = self._position(i)
        snap = self.ctx.run[i]
        names = self.species if species is None else [species]
        if species is not None:
            snap.frame(species)   # names the species there are when it is not one of them
        parts = []
        for sp in names:
            if sp not in snap.species:
                continue
            f = snap.species[sp]
            cols = list(f.columns) if columns is None else [str(c) for c in
                                                            ([columns] if isinstance(columns, str)
                                                             else columns)]
            missing = [c for c in cols if c not in f]
            if missing:
                raise InputError(f.source or snap.path, f"species '{sp}' has no column "
                                 f"'{missing[0]}'", f"columns are: {', '.join(f.columns)}")
            if use_dask(self.ctx, f, cols):
                part = frame_to_dask(f, cols)
            else:
                from ..core.frame import transient_columns
                with transient_columns([f]):
                    part = pd.DataFrame({c: f[c] for c in cols}, columns=cols)
            parts.append((sp, part))
        if not parts:
            raise InputError(snap.path, "has none of the species asked for",
                             f"species are: {', '.join(snap.species)}")
        if len(names) == 1:
            return parts[0][1]
        tagged = [p.assign(species=sp) for sp, p in parts]
        if any(not isinstance(p, pd.DataFrame) for _, p in parts):
            import dask.dataframe as dd
            return dd.concat(tagged)
        out = pd.concat(tagged, ignore_index=True)
        out["species"] = pd.Categorical(out["species"], categories=[sp for sp, _ in parts])
        return out

    # the tables of the export -------------------------------------------------------
    def census(self, snapshots=None) -> pd.DataFrame:
        """``census.csv``: particles and weight per block, per snapshot, per species and ``all``."""
        from ..audit.tables import census_table
        return census_table(self.ctx, snapshots)

    def _migration_tables(self):
        if self._migration is None:
            from ..audit.tables import migration_tables
            if len(self) > 1:
                self._migration = migration_tables(self.ctx)
            else:
                from .export import _empty_migration
                self._migration = _empty_migration()
        return self._migration

    def migration(self) -> pd.DataFrame:
        """``migration.csv``: block-to-block moves of matched particles between consecutive snapshots."""
        return self._migration_tables()[0].copy()

    def migration_summary(self) -> pd.DataFrame:
        """``migration_summary.csv``: matched, migrated, created, lost and jumps per snapshot pair."""
        return self._migration_tables()[1].copy()

    def halo(self, snapshot: int = 0, width_cells: float = 1) -> pd.DataFrame:
        """Per block of one snapshot: its particles (``count``) and how many of them other
        blocks need as ghosts within ``width_cells`` level-0 cells (``halo``), per species
        and ``all`` (the README's *Halo*)."""
        from ..audit.tables import halo_table
        return halo_table(self.ctx, snapshot, width_cells)

    def drift(self) -> pd.DataFrame:
        """``drift.csv``: every total of every snapshot against the first snapshot."""
        from ..audit.tables import drift_table
        return drift_table(self.ctx)

    # the gate -----------------------------------------------------------------------
    def check(self, rtol: float, quantities=None) -> CheckOutcome:
        """The gate of ``swarmaudit check --rtol X [--quantities a,b]``.

        Returns a :class:`CheckOutcome` (``.passed`` is what the exit code 0/1
        says); ``quantities`` is a list or comma-separated names.
        """
        from ..audit.tables import check
        from .check import _quantities
        names = _quantities(quantities) if isinstance(quantities, str) else quantities
        res = check(self.ctx, rtol, names)
        failures = pd.DataFrame(res.failures)
        table = res.table if res.table is not None else pd.DataFrame()
        return CheckOutcome(bool(res.ok), float(rtol), failures, table, list(res.lines))

    def compare(self, candidate, *, pair: str = "step", time_tol=None, mode: str = "auto",
                position_cells=None, ks_p=None, rtol=None, ks_correction: str = "holm",
                **options) -> CompareOutcome:
        """``swarmaudit compare REF CAND`` with this run as the reference.

        ``candidate`` is another :class:`AuditedRun`, or a path opened with
        ``options`` (the run options of :func:`open_run`). ``pair`` is
        ``step`` or ``time``; ``mode`` ``auto``, ``particles``,
        ``distributions`` or ``both``; ``position_cells``, ``ks_p`` and
        ``rtol`` are the gate's tolerances and ``ks_correction`` (``holm``, ``bh``
        or ``none``) the correction of its p-values, as on the command line.
        """
        from ..audit import compare as C
        other = candidate if isinstance(candidate, AuditedRun) else open_run(candidate, **options)
        comp = C.compare_runs(self.ctx, other.ctx, pair=pair, time_tol=time_tol, mode=mode)
        result = C.gate(comp, position_cells, ks_p, rtol, ks_correction)
        lines = [f"reference: {self.ctx.run.source}", f"candidate: {other.ctx.run.source}",
                 *C.summary_lines(comp), *result.lines]
        return CompareOutcome(bool(result.ok), comp, pd.DataFrame(result.failures), lines)

    # files --------------------------------------------------------------------------
    def export(self, out_dir, *, movie: str | None = None, **options):
        """Write what ``swarmaudit export RUN --out out_dir`` writes; returns what was written.

        ``options`` are the export options by name: ``snapshots="all"``,
        ``rtol=1e-3``, ``width``, ``height``, ``dpi``, ``cmap``, ``scale``,
        ``space="x,y"``, ``phase="x,ux"``, ``range=["ux=-1,1"]``,
        ``quiet``. ``movie="mp4"`` (or ``gif``, ``webp``) adds the movies.
        """
        from types import SimpleNamespace
        from .export import ExportOptions, export_run
        args = _export_args(out_dir, options)
        args.movie = movie
        opts = ExportOptions.from_args(args)
        from .movie import write_movie
        return export_run(self.ctx, opts, SimpleNamespace(**vars(args), **self._inputs),
                          movie_writer=write_movie)

    def movie(self, out, view: str = "space", *, species: str | None = None, fps: float = 8,
              snapshots: str = "all", **options):
        """Write a movie of the run (``.mp4``, ``.gif`` or ``.webp``) with one colour scale.

        The same as ``swarmaudit movie RUN --view VIEW --out FILE``: every
        snapshot (or ``snapshots="0,10,-1"``) drawn like the export's figures,
        one colour scale over all frames. ``options`` are the figure options
        of the export (``width``, ``height``, ``dpi``, ``cmap``, ``scale``,
        ``space="x,y"``/``phase="x,ux"``, ``range=[...]``, ``quiet``).
        Returns the movie's description (path, frames, scale).
        """
        from types import SimpleNamespace
        from .export import ExportOptions
        from .movie import write_movie
        args = _export_args(os.path.dirname(os.fspath(out)) or ".", options)
        opts = ExportOptions.from_args(args)
        return write_movie(self.ctx, os.fspath(out), view=view, species=species, fps=fps,
                           snapshots=snapshots, opts=opts, args=SimpleNamespace(**self._inputs))

    # views --------------------------------------------------------------------------
    def view(self, which: str = "dashboard", **state):
        """The dashboard, or one of its views, as a Panel object for a notebook.

        ``which`` is ``dashboard``, ``space``, ``phase`` or a side panel
        (``blocks``, ``migration``, ``drift``, ``histogram``, ``compare``; the tabs' names). ``state`` sets the
        view as a shared link does, by the state's names or the link's keys:
        ``snapshot=3`` (or ``snap=3``), ``species="all"``, ``space_x="x"``,
        ``phase_y="ux"``, ``scaling="log"``, ``cmap="viridis"``,
        ``blocks="tinted"``, ``space_xr=(0, 0.5)``, ``rtol=1e-3`` ...
        ``reference=`` another run (an AuditedRun, or a path opened with this run's
        options) compares with it as the dashboard does: ``show="reference"`` or
        ``"difference"``, ``pair_by="time"``, and the Compare tab (``which="compare"``).
        A value that is not a choice is an OptionError.
        """
        import panel as pn
        from .dashboard import Dashboard, VIEW_STYLE
        from .state import SIDE_PANELS, URL_KEYS, ServerState, ViewState
        from .view_policy import PANEL_ALIASES
        which = PANEL_ALIASES.get(which, which)
        if which not in VIEWS:
            raise OptionError(f"view() takes one of {', '.join(VIEWS)}, got '{which}'")
        _load_notebook_extension()
        if self._server is None:      # this run's own server state, shared by its views
            self._server = ServerState()
            self._server.add(self.name, self.ctx)
        query = {}
        ref = state.pop("reference", state.pop("ref", None))
        if ref not in (None, ""):
            other = ref if isinstance(ref, AuditedRun) else open_run(ref, **self._inputs)
            runs = self._server.runs
            served = next((runs[n] for n in runs.names if runs[n].ctx is other.ctx), None)
            if served is None:
                served = self._server.add(other.name, other.ctx)
            query["ref"] = served.name
        view_state = ViewState(self._server.runs)
        inverse = {v: k for k, v in URL_KEYS.items()}
        for key, value in state.items():
            name = inverse.get(key, key)
            if name not in URL_KEYS:
                raise OptionError(f"view() has no state called '{key}'; the state names are: "
                                  f"{', '.join(URL_KEYS)}")
            if name == "run":
                raise OptionError("view() shows this run; open another run with open_run()")
            query[URL_KEYS[name]] = value
        if which in SIDE_PANELS:
            query.setdefault("tab", which)
        refused = view_state.apply_query(query)
        if refused:
            names = {v: k for k, v in URL_KEYS.items()}
            bad = names.get(refused[0], refused[0])
            p = view_state.param[bad]
            choices = (f" ({', '.join(map(str, p.objects))})"
                       if getattr(p, "objects", None) and len(p.objects) < 30 else "")
            raise OptionError(f"view(): {bad}={state.get(bad, state.get(refused[0]))!r} is not one "
                              f"of the choices for this run{choices}")
        dash = Dashboard(view_state, self._server)
        self._last_dashboard = dash          # the dashboard behind the last view (its state, its views)
        if which == "dashboard":
            return dash.page()
        if which in ("space", "phase"):
            view = dash.space_view if which == "space" else dash.phase_view
            return pn.Column(pn.panel(view), dash._status[which], styles=VIEW_STYLE)
        panel = {"blocks": dash.side.blocks_panel,
                 "migration": lambda: pn.Column(pn.panel(dash.side.moves_panel), dash.side._moves),
                 "drift": lambda: pn.Column(pn.panel(dash.side.totals_panel), dash.side._totals),
                 "histogram": dash.side.histogram_panel,
                 "compare": lambda: pn.Column(pn.panel(dash.side.compare_panel), dash.side._compare)}[which]
        return pn.Column(pn.panel(panel) if which in ("blocks", "histogram") else panel(),
                         sizing_mode="stretch_width")


def _export_args(out_dir, options: dict):
    """The export's options as the namespace its parser would make (same defaults, same checks)."""
    from types import SimpleNamespace
    defaults = dict(snapshots="first,last", rtol=None, width=900, height=700, dpi=100,
                    cmap=DEFAULT_CMAP, scale=DEFAULT_SCALING, space=None, phase=None, range=[], quiet=True,
                    view=None)
    unknown = [k for k in options if k not in defaults]
    if unknown:
        raise OptionError(f"no export option called {', '.join(repr(k) for k in unknown)}; "
                          f"options are: {', '.join(defaults)}")
    values = {**defaults, **options}
    for pair in ("space", "phase"):
        v = values[pair]
        if v is not None and not isinstance(v, str):
            values[pair] = ",".join(str(c) for c in v)
    if isinstance(values["range"], dict):
        values["range"] = [f"{c}={lo},{hi}" for c, (lo, hi) in values["range"].items()]
    elif isinstance(values["range"], str):
        values["range"] = [values["range"]]
    if isinstance(values["snapshots"], (list, tuple)):
        values["snapshots"] = ",".join(str(int(i)) for i in values["snapshots"])
    return SimpleNamespace(out=os.fspath(out_dir), **values)


_EXTENSION = {"loaded": False}


def _load_notebook_extension() -> None:
    """Load Panel's notebook extension once, when there is a notebook kernel to load it into."""
    if _EXTENSION["loaded"]:
        return
    try:
        from IPython import get_ipython
    except ImportError:
        return
    if get_ipython() is None:
        return
    import panel as pn
    pn.extension("tabulator")
    _EXTENSION["loaded"] = True


#: the run options ``open_run`` takes (for ``help`` and tab completion)
OPEN_RUN_OPTIONS = tuple(k for k in RUN_OPTIONS)
