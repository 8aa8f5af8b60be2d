"""The side panels of the dashboard: Blocks, Migration, Drift, Histogram, Compare (view_policy.PANELS).

Numbers come from ``core.audit`` / ``diagnostics`` and figures from
``app.figures`` (the builders the export uses). Work over a whole run (drift)
or between two snapshots (migration) runs in a worker thread with a
progress bar; its result is kept by the server (``ServerState.results``), so
every viewer and every revisit gets it at once.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import holoviews as hv
import panel as pn
import param

from ..audit.compare import PAIR_COLUMNS
from ..core.errors import SwarmAuditError
from . import figures
from .state import ALL_SPECIES, SIDE_PANELS, ServerState, ViewState
from .view_policy import (COMPARE_TABLE_TITLES, LABELS, PANELS as TAB_TITLES, SUMMARY_LABELS,
                          TABLE_DIGITS)

#: size of each side figure on the page (two side by side beside the controls)
SIDE_W, SIDE_H = 560, 400

def _run_key(state) -> tuple:
    return _served_key(state.served)


def _served_key(served) -> tuple:
    # the name of the run (unique within a server, and results are per server); the epoch
    # changes when a live run's rescan re-opened or moved snapshots, so results computed by
    # position are not reused for other files
    return (served.name,) + ((served.epoch,) if served.epoch else ())


def _fit(obj, width=SIDE_W, height=SIDE_H):
    """The figure at the page's size (the builders' default size suits a report)."""
    return obj.opts(width=width, height=height, backend="bokeh")


def _note(text: str, kind: str = "info"):
    return pn.pane.Alert(text, alert_type=kind, margin=(8, 4))


class SidePanels(param.Parameterized):
    """The tabs under the particle views; each tab is a view of the same state."""

    def __init__(self, state: ViewState, server: ServerState, **params):
        super().__init__(**params)
        self.state = state
        self.results = server.results
        self._moves = pn.Column(sizing_mode="stretch_width", min_height=200)
        self._totals = pn.Column(sizing_mode="stretch_width", min_height=200)
        self._compare = pn.Column(sizing_mode="stretch_width", min_height=200)
        self._watchers: dict[str, object] = {}
        self._token = {"moves": 0, "totals": 0, "compare": 0}
        #: the Compare tab's tables as last shown (name -> the rows of the pair and species in view)
        self.compare_shown: dict[str, pd.DataFrame] = {}

    # tabs ------------------------------------------------------------------------------
    def tabs(self):
        s = self.state
        # every tab is built with the page (dynamic=False): a tab built only when first shown
        # drops content that arrives later (a result filled in from the periodic callback of
        # ``_start`` sometimes never reaches the browser); the panels compute the same either
        # way, since their functions run when the page is built
        tabs = pn.Tabs(
            (TAB_TITLES["blocks"], pn.panel(self.blocks_panel, loading_indicator=True)),
            (TAB_TITLES["migration"], pn.Column(pn.panel(self.moves_panel), self._moves)),
            (TAB_TITLES["drift"], pn.Column(pn.panel(self.totals_panel), self._totals)),
            (TAB_TITLES["histogram"], pn.panel(self.histogram_panel, loading_indicator=True)),
            (TAB_TITLES["compare"], pn.Column(pn.panel(self.compare_panel), self._compare)),
            active=SIDE_PANELS.index(s.side), dynamic=False,
            styles={"background": "#ffffff", "border": "1px solid #e4e0d8", "border-radius": "6px"},
            sizing_mode="stretch_width", margin=(8, 4))
        tabs.param.watch(lambda e: s.param.update(side=SIDE_PANELS[e.new]), "active")
        s.param.watch(lambda e: setattr(tabs, "active", SIDE_PANELS.index(e.new)), "side")
        return tabs

    # census ----------------------------------------------------------------------------
    def census(self, i: int, served=None):
        """(block table, rank table, imbalance over ranks) of snapshot ``i`` of the run in view
        (or of ``served``), species in view."""
        s = self.state
        served = served if served is not None else s.served
        key = ("census", _served_key(served), int(i), s.species)
        from ..audit import tables as audit
        return self.results.cached(key, lambda: audit.snapshot_census(served.ctx, int(i), s.species))

    def block_counts(self, i: int, served=None):
        """Particles per layout row of snapshot ``i`` (for tinting the block overlay)."""
        served = served if served is not None else self.state.served
        try:
            blocks, _, _ = self.census(i, served)
            layout = served.layout(i)
        except (SwarmAuditError, ImportError, AttributeError):
            return None
        per = blocks.groupby("block")["count"].sum()
        rows = layout.block_index(per.index.to_numpy(dtype=np.int64))
        counts = np.zeros(layout.nblocks)
        ok = rows >= 0
        counts[rows[ok]] = per.to_numpy(dtype=float)[ok]
        return counts

    @param.depends("state.run", "state.snapshot", "state.species", "state.data_revision")
    def blocks_panel(self):
        s = self.state
        i = s.snapshot
        try:
            blocks, ranks, imb = self.census(i)
            layout = s.served.layout(i)
            from ..audit import tables as audit
            whatif = self.results.cached(("whatif", _run_key(s), i), lambda: audit.rebalance_table(s.served.ctx, i))
        except (ImportError, AttributeError):
            return _note("The block census is not available in this build.")
        except SwarmAuditError as exc:
            return _note(f"No census for snapshot {i}: {exc}", "warning")
        cmap = _fit(figures.census_map(blocks, layout, title="particles per block"))
        bars = _fit(figures.rank_bars(ranks, imb, title="particles per rank"))
        facts = _imbalance_facts(imb, blocks, layout)
        table = pn.widgets.Tabulator(whatif, disabled=True, show_index=False, height=180,
                                     sizing_mode="stretch_width", layout="fit_data_stretch") \
            if whatif is not None and len(whatif) else pn.pane.Markdown("")
        return pn.Column(
            pn.Row(pn.pane.HoloViews(cmap, backend="bokeh", linked_axes=False), pn.pane.HoloViews(bars, backend="bokeh", linked_axes=False)),
            pn.pane.Markdown(facts, styles={"font-size": "13px"}),
            pn.pane.Markdown("**What if the blocks were dealt out again?** Load per rank under "
                             "other assignments of the same blocks:", margin=(4, 8, 0, 8)),
            table, sizing_mode="stretch_width")

    # migration -------------------------------------------------------------------------
    @param.depends("state.run", "state.snapshot", "state.species", "state.compare_to",
                   "state.run_revision")
    def moves_panel(self):
        s = self.state
        n = s.nsnapshots
        if n < 2:
            self._moves.objects = []
            return _note("This run has one snapshot: there is nothing to compare it with, so "
                         "migration is not shown.")
        i = s.snapshot
        ref = s.compare_to if s.compare_to >= 0 else i - 1
        options = {"previous snapshot": -1}
        options.update({s.served.describe(k): k for k in range(n)})
        pick = pn.widgets.Select(label=LABELS["compare_to"], options=options, value=s.compare_to,
                                 width=320)
        pick.param.watch(lambda e: s.param.update(compare_to=e.new), "value")
        if ref < 0 or ref == i:
            self._moves.objects = [_note("Pick another snapshot to compare with (the first "
                                         "snapshot has no previous one).")]
            return pick
        a, b = (ref, i) if ref < i else (i, ref)
        key = ("moves", _run_key(s), a, b, s.species)

        def work(progress=None):
            return snapshot_migration(s.served.ctx, a, b, s.species, progress=progress)
        self._start(self._moves, "moves", key, work, lambda res: self._show_moves(res, a, b))
        return pick

    def _show_moves(self, res, a, b):
        table, summary, disp, steps = res
        s = self.state
        heat = _fit(figures.transfer_heatmap(table, title=f"block to block, {a} → {b}"))
        hist = _fit(figures.displacement_histogram(disp, steps, title="displacement"))
        facts = _moves_facts(summary)
        return pn.Column(pn.pane.Markdown(facts, styles={"font-size": "13px"}),
                         pn.Row(pn.pane.HoloViews(heat, backend="bokeh", linked_axes=False),
                                pn.pane.HoloViews(hist, backend="bokeh", linked_axes=False)),
                         sizing_mode="stretch_width")

    # drift -----------------------------------------------------------------------------
    @param.depends("state.run", "state.species", "state.rtol", "state.run_revision")
    def totals_panel(self):
        s = self.state
        n = s.nsnapshots
        if n < 2:
            self._totals.objects = []
            return _note("This run has one snapshot: a drift needs at least two, so drift is "
                         "not shown.")
        rtol = pn.widgets.FloatInput(label=LABELS["rtol"], value=s.rtol, start=1e-15,
                                     step=1e-4, width=200)
        rtol.param.watch(lambda e: s.param.update(rtol=float(e.new)) if e.new and e.new > 0 else None,
                         "value")
        key = ("totals", _run_key(s), s.species, len(s.served))   # a live run grows

        def work(progress=None):
            return run_drift(s.served.ctx, progress=progress)
        self._start(self._totals, "totals", key, work, self._show_totals)
        return rtol

    def _show_totals(self, drift):
        s = self.state
        if s.species != ALL_SPECIES:
            # the species' own totals plus the run-wide scalars (field energy, total energy)
            drift = drift[drift["species"].astype(str).isin([s.species, ALL_SPECIES])]
        from ..audit import tables as audit
        checked = audit.checked_pairs(drift)
        fig = figures.drift_curves(drift, s.rtol, title="drift against the first snapshot",
                                   checked=checked)
        exits = figures.first_exits(drift, s.rtol)
        gated = set(checked)
        is_gated = [(str(r.species), str(r.quantity)) in gated for r in exits.itertuples()]
        out = exits[is_gated].sort_values("snapshot", kind="stable") if len(exits) else exits
        if len(out):
            lines = [f"- **{r.quantity}** ({r.species}) first leaves ±{s.rtol:g} at snapshot "
                     f"{int(r.snapshot)}" for r in out.head(8).itertuples()]
            if len(out) > 8:
                lines.append(f"- … and {len(out) - 8} more (every curve is drawn below)")
            facts = "\n".join(lines)
        else:
            facts = (f"Every checked total (count, weight and charge per species; momentum and "
                     f"total energy of all) stays within ±{s.rtol:g} of the first snapshot.")
        others = len(exits) - len(out) if len(exits) else 0
        if others:
            facts += (f"\n\n{others} other curve(s) — per-species momentum and energy, field energy — "
                      "are drawn for context; they need not be conserved on their own, so no band "
                      "is drawn for them.")
        # one pane per total, three to a row: a single bokeh grid (or a flex box) of many
        # plots beside the controls and the dynamic views was left unpainted by the browser
        items = list(fig) if isinstance(fig, hv.Layout) else [fig]
        cells = [pn.pane.HoloViews(item, backend="bokeh", linked_axes=False) for item in items]
        rows = [pn.Row(*cells[k:k + 3]) for k in range(0, len(cells), 3)]
        return pn.Column(pn.pane.Markdown(facts, styles={"font-size": "13px"}), *rows,
                         sizing_mode="stretch_width")

    # histogram -------------------------------------------------------------------------
    @param.depends("state.run", "state.snapshot", "state.species", "state.hist_column",
                   "state.data_revision")
    def histogram_panel(self):
        s = self.state
        col = s.hist_column
        pick = pn.widgets.Select.from_param(s.param.hist_column, label=LABELS["hist_column"], width=240)
        try:
            frame = s.frame()
            values = frame[col]
        except SwarmAuditError as exc:
            return pn.Column(pick, _note(str(exc), "warning"))
        if values.dtype.kind not in "fiub":
            return pn.Column(pick, _note(f"Column '{col}' is not numeric.", "warning"))
        w = frame.per_particle("weight", None)
        from .render import axis_label
        bad = int(np.count_nonzero(~np.isfinite(values))) if values.dtype.kind == "f" else 0
        fig = _fit(figures.histogram_1d(values, weights=w, bins=80,
                                        title=f"{col} of {s.species} (snapshot {s.snapshot})",
                                        xlabel=axis_label(frame, col)), width=760)
        note = pn.pane.Markdown(f"{bad:,} NaN/inf values left out." if bad else "",
                                styles={"font-size": "13px"})
        return pn.Column(pick, pn.pane.HoloViews(fig, backend="bokeh", linked_axes=False), note)

    # comparison with a reference run -------------------------------------------------------
    def pairing(self):
        """``ViewState.reference_pairing``, kept in the server's shared results."""
        s = self.state
        ref = s.reference_run
        if ref is None:
            return None
        cand = s.served
        key = ("pairing", _served_key(ref), _served_key(cand), s.pair_by, ref.version, cand.version)
        return self.results.cached(key, s.reference_pairing)

    def reference_snapshot(self, j: int) -> int:
        """``ViewState.reference_snapshot`` with the shared pairing."""
        return self.state.reference_snapshot(j, self.pairing())

    def reference_frame(self, j: int):
        """``ViewState.reference_frame`` with the shared pairing."""
        return self.state.reference_frame(j, self.pairing())

    @param.depends("state.run", "state.reference", "state.pair_by", "state.snapshot",
                   "state.species", "state.run_revision", "state.data_revision")
    def compare_panel(self):
        s = self.state
        if len(s.param.reference.objects) < 2:
            self._compare.objects = []
            self.compare_shown = {}
            return _note("This server shows one run. Serve two (`swarmaudit serve REF CAND`) to "
                         "compare them here.")
        if not s.reference:
            self._compare.objects = []
            self.compare_shown = {}
            return _note(f"Choose a reference run under **{LABELS['reference']}** (left) to "
                         f"compare {s.run} with it.")
        j = s.snapshot
        try:
            i = self.reference_snapshot(j)
        except SwarmAuditError as exc:
            self._compare.objects = []
            self.compare_shown = {}
            return _note(f"Nothing to compare: {exc}.", "warning")
        ref, cand = s.reference_run, s.served
        head = pn.pane.Markdown(
            f"Reference **{_md(s.reference)}** {_md(ref.describe(i))} against candidate "
            f"**{_md(s.run)}** {_md(cand.describe(j))}, paired by {s.pair_by}; "
            f"species {_md(s.species)}.", styles={"font-size": "13px"})
        by, species = s.pair_by, s.species
        key = ("compare", _served_key(ref), _served_key(cand), by, i, j)

        def work(progress=None):
            return pair_comparison(ref.ctx, cand.ctx, i, j, by, progress=progress)
        self._start(self._compare, "compare", key, work, lambda comp: self._show_comparison(comp, species),
                    label=f"Comparing reference snapshot {i} with snapshot {j}…")
        return head

    def _show_comparison(self, comp, species):
        from ..audit.compare import finding_lines
        tables = comparison_rows(comp, species)
        self.compare_shown = tables
        lines = finding_lines(comp)
        parts = [pn.pane.Markdown("\n".join(f"- {_md(t)}" for t in lines) if lines else
                                  "No particle or distribution finding for this pair.",
                                  styles={"font-size": "13px"})]
        for name, title in COMPARE_TABLE_TITLES.items():
            df = tables[name]
            parts.append(pn.pane.Markdown(f"**{title}** · `{name}` · {len(df):,} row(s)",
                                          margin=(8, 8, 0, 8), styles={"font-size": "13px"}))
            if len(df):
                # the pair is named above the tables, and the particles' ids have a table of their
                # own: those columns stay in the table, out of sight
                hidden = [c for c in df.columns if c in PAIR_COLUMNS or c == "worst_ids"]
                parts.append(_table(df, hidden))
        if comp.notes:
            parts.append(pn.pane.Markdown("\n".join(f"- {_md(n)}" for n in comp.notes[:8]),
                                          styles={"font-size": "12px", "color": "#5b6473"}))
        return pn.Column(*parts, sizing_mode="stretch_width")

    # background work -------------------------------------------------------------------
    def _start(self, holder, name, key, work, show, label="Working through the run…"):
        """Show ``show(result)`` in ``holder`` when ``work`` is done; a progress bar meanwhile."""
        self._token[name] += 1
        token = self._token[name]
        fut = self.results.submit(key, work)
        if fut.done():
            holder.objects = [self._outcome(fut, show)]
            return
        bar = pn.indicators.Progress(value=0, max=100, width=320, bar_color="info")
        label = pn.pane.Markdown(label, margin=(0, 8))
        holder.objects = [pn.Row(pn.indicators.LoadingSpinner(value=True, size=24), label, bar)]

        def poll():
            if self._token[name] != token:
                cb.stop()
                return
            bar.value = int(100 * self.results.progress(key))
            if fut.done():
                cb.stop()
                holder.objects = [self._outcome(fut, show)]
        try:
            cb = pn.state.add_periodic_callback(poll, period=300, start=True)
        except Exception:     # no event loop (a script): wait for the result instead
            fut.result()
            holder.objects = [self._outcome(fut, show)]

    @staticmethod
    def _outcome(fut, show):
        exc = fut.exception()
        if exc is None:
            try:
                return show(fut.result())
            except SwarmAuditError as err:
                return _note(str(err), "warning")
        if isinstance(exc, SwarmAuditError):
            return _note(str(exc), "warning")
        return _note(f"This could not be computed ({type(exc).__name__}: {exc}).", "danger")


def _table(df: pd.DataFrame, hidden=()):
    """A table of numbers as the page shows it: every row kept, small and large values in
    scientific notation (a plain number format would print 7e-07 as 0.0)."""
    from bokeh.models.widgets.tables import ScientificFormatter
    fmt = ScientificFormatter(precision=TABLE_DIGITS, power_limit_low=-3, power_limit_high=7)
    floats = {c: fmt for c in df.columns if df[c].dtype.kind == "f"}
    return pn.widgets.Tabulator(df, disabled=True, show_index=False, hidden_columns=list(hidden),
                                frozen_columns=["species"] if "species" in df else [],
                                formatters=floats, pagination="local" if len(df) > 12 else None,
                                page_size=12, width=2 * SIDE_W, layout="fit_data_table")


def _md(text) -> str:
    """Text from a run (names, notes) shown as markdown: its markup characters taken literally."""
    import re
    return re.sub(r"([\\`*_{}\[\]<>#|~])", r"\\\1", str(text))


def _imbalance_facts(imb, blocks, layout) -> str:
    def get(k):
        try:
            return imb[k]
        except (KeyError, TypeError, IndexError):
            return getattr(imb, k, None)
    parts = []
    ratio = get("max_over_mean")
    if ratio is not None:
        parts.append(f"max/mean load over ranks **{float(ratio):.3f}**")
    for k, label in (("max", "busiest rank"), ("mean", "mean"), ("min", "idlest rank")):
        v = get(k)
        if v is not None:
            parts.append(f"{label} {float(v):,.0f}")
    outside = blocks.loc[blocks["block"] == -1, "count"].sum() if "block" in blocks else 0
    if outside:
        parts.append(f"**{int(outside):,} particles in no block**")
    parts.append(f"{layout.nblocks} blocks on {len(layout.levels)} level(s), "
                 f"{layout.nranks} rank(s)")
    return " · ".join(parts)


def _moves_facts(summary: pd.DataFrame) -> str:
    if summary is None or not len(summary):
        return "No particles to match."
    row = summary.sum(numeric_only=True)
    bits = []
    for k in ("matched", "migrated", "created", "lost"):
        if k in row:
            bits.append(f"{SUMMARY_LABELS[k]} **{int(row[k]):,}**")
    if "max_displacement_cells" in summary:
        bits.append(f"{SUMMARY_LABELS['max_displacement_cells']} "
                    f"**{float(summary['max_displacement_cells'].max()):.3g}**")
    if "over_one_cell" in summary:
        bits.append(f"{SUMMARY_LABELS['over_one_cell']} **{int(row['over_one_cell']):,}**")
    return " · ".join(bits)


# ---------------------------------------------------------------------------------------
# data for the panels, composed from the public run-level tables of core.audit
def _species_rows(df: pd.DataFrame, species: str) -> pd.DataFrame:
    if df is None or not len(df) or "species" not in df:
        return df
    return df[df["species"].astype(str) == species]


def snapshot_migration(ctx, a: int, b: int, species: str, progress=None):
    """(moves, summary, displacements in level-0 cells, steps apart) between snapshots a and b."""
    from ..audit import tables as audit
    if progress:
        progress(0, 3)
    moves, summary = audit.migration_tables(ctx, [(a, b)])
    moves = _species_rows(moves, species)
    summary = _species_rows(summary, species)
    if progress:
        progress(2, 3)
    names = [n for n in ctx.species_names() if species in (ALL_SPECIES, n)]
    disp, steps = audit.pair_displacements(ctx, a, b, names)
    if progress:
        progress(3, 3)
    return moves, summary, disp, steps


def pair_comparison(ref_ctx, cand_ctx, i: int, j: int, pair_by: str, progress=None):
    """The comparison of reference snapshot ``i`` with candidate snapshot ``j``: what
    ``swarmaudit compare`` tabulates for that pair (audit.compare.compare_runs, the pair alone)."""
    from ..audit.compare import compare_runs
    if progress:
        progress(0, 1)
    comp = compare_runs(ref_ctx, cand_ctx, pair=pair_by, only=[(i, j)])
    if progress:
        progress(1, 1)
    return comp


def comparison_rows(comp, species: str) -> dict[str, pd.DataFrame]:
    """The ``compare_*`` tables of a comparison, the rows of ``species`` (every row for ``all``)."""
    out = {}
    for name, df in comp.tables().items():
        if species != ALL_SPECIES and "species" in df:
            df = df[df["species"].astype(str) == species]
        out[name] = df.reset_index(drop=True)
    return out


def run_drift(ctx, progress=None):
    """The drift table of the whole run, reading snapshot after snapshot with progress."""
    from ..audit import tables as audit
    n = len(ctx.run)
    reduce = getattr(audit, "_reduce", None)
    if reduce is not None and progress is not None:
        # the per-snapshot totals are what takes time; warm them one by one to show progress
        for i in range(n):
            reduce(ctx, i, "totals")
            progress(i + 1, n + 1)
    table = audit.drift_table(ctx)
    if progress:
        progress(1, 1)
    return table
