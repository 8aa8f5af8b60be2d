"""The dashboard page: two particle views (space, phase) and the audit side panels.

Every view is a function of one :class:`~.state.ViewState`; the images come
from :func:`.render.aggregate_points`, the same code the export uses, and
are re-aggregated at full resolution on every zoom and pan (a DynamicMap fed
by a RangeXY stream). Only the image reaches the browser.
"""

from __future__ import annotations

import logging
import os

import numpy as np
import panel as pn
import param

import holoviews as hv

from ..core.errors import SwarmAuditError
from . import render, view_policy
from .state import ServerState, ViewState
from .view_policy import (BLOCK_MODE_LABELS, CMAPS, COLOR_BY_LABELS, LABELS, NO_REFERENCE,
                          PAIR_LABELS, SCALING_LABELS, SECTIONS, SHOW_LABELS)

log = logging.getLogger("swarmaudit.dashboard")

#: pixels of each particle view (the view policy bins for exactly this box)
VIEW_W, VIEW_H = view_policy.SCREEN_BOX
#: the page's own colours
INK = "#1d2433"
ACCENT = "#0f8b8d"
HIGHLIGHT = ["#7ff3ff", "#00c2e0"]
BLOCK_LINE = "#0f8b8d"
PAPER = "#fbfaf7"

# Panel components each live in their own shadow root: a page stylesheet stops at the first
# one, so boxes are styled through their own ``styles`` (inherited text styles pass through).
PAGE_STYLE = {"background": PAPER, "color": INK,
              "font-family": '"Inter", "Segoe UI", "Helvetica Neue", Arial, sans-serif'}
HEADER_STYLE = {"background": "linear-gradient(90deg, #17324d 0%, #1d4e5f 62%, #0f8b8d 100%)",
                "border-bottom": "3px solid #e9c46a", "color": "#f7f4ec"}
CONTROLS_STYLE = {"background": "#ffffff", "border-right": "1px solid #e4e0d8",
                  "padding-bottom": "14px", "min-height": "100vh"}
VIEW_STYLE = {"background": "#ffffff", "border": "1px solid #e4e0d8", "border-radius": "6px"}
STATUS_STYLE = {"font-size": "12px", "color": "#5b6473"}

def _canvas_plots():
    # Images and a few dozen bars gain nothing from WebGL, and a page with a dozen plots
    # would hold a dozen GL contexts; browsers cap those and stop drawing the later plots.
    import holoviews.plotting.bokeh  # noqa: F401
    hv.renderer("bokeh").webgl = False


_canvas_plots()

_CSS_PATH = os.path.join(os.path.dirname(__file__), "assets", "dashboard.css")


def _css() -> str:
    try:
        with open(_CSS_PATH, encoding="utf-8") as fh:
            return fh.read()
    except OSError:
        return ""


def _message_element(text: str, x_range=(0, 1), y_range=(0, 1)):
    x = 0.5 * (x_range[0] + x_range[1])
    y = 0.5 * (y_range[0] + y_range[1])
    return hv.Text(x, y, text).opts(backend="bokeh", text_color="#9a3412", text_font_size="11pt")


def _highlight(img):
    # 1 = selected pixel, 0 = none; below the colour range is transparent, so no NaN is needed
    return img.opts(backend="bokeh", cmap=HIGHLIGHT, colorbar=False, alpha=0.9, clim=(0.5, 1.5),
                    clipping_colors={"min": (0, 0, 0, 0), "NaN": (0, 0, 0, 0)}, tools=[])


class Dashboard(param.Parameterized):
    """One session's page, built around its ViewState and the server's shared state."""

    reset_count = param.Integer(0, doc="bumped by 'reset zoom' to rebuild the views at their opening ranges")

    def __init__(self, state: ViewState, server: ServerState, **params):
        super().__init__(**params)
        self.state = state
        self.server = server
        self._status = {"space": pn.pane.Markdown("", styles=STATUS_STYLE, margin=(0, 8)),
                        "phase": pn.pane.Markdown("", styles=STATUS_STYLE, margin=(0, 8))}
        self.problem = pn.pane.Alert("", alert_type="warning", visible=False, margin=(4, 8))
        self.selection_info = pn.pane.Markdown("", styles={"font-size": "12.5px"}, margin=(0, 10),
                                               width=300)
        self.link_text = pn.widgets.TextInput(label="", value="", sizing_mode="stretch_width",
                                              styles={"font-size": "12px"})
        self._base_url = ""
        #: the view policy's decision and the aggregate behind each picture last drawn
        self.shown: dict[str, tuple] = {}
        self.link_note = pn.pane.Alert("", alert_type="info", visible=False, margin=(4, 8))
        self._show_link_notes()
        state.param.watch(self._update_link, list(state.param))
        state.param.watch(self._check_snapshot, ["snapshot", "run", "species"])
        state.param.watch(self._update_selection_info,
                          ["select_box", "select_view", "snapshot", "species", "run"])
        state.param.watch(self._check_snapshot, ["data_revision"])
        self.live_note = pn.pane.Markdown("", styles=STATUS_STYLE, margin=(0, 10), width=300)
        state.param.watch(self._update_live_note, ["run_revision", "run"])
        self._check_snapshot()
        self._update_selection_info()
        self._update_live_note()
        from .panels import SidePanels
        self.side = SidePanels(state, server)

    def _show_link_notes(self):
        notes = self.state.link_notes
        self.link_note.object = "\n\n".join(notes[:6]) + (
            f"\n\n… and {len(notes) - 6} more." if len(notes) > 6 else "")
        self.link_note.visible = bool(notes)

    # a run still being written ---------------------------------------------------------
    def follow_run(self):
        """What each session's timer calls: rescan the served run (shared, rate-limited), catch up."""
        try:
            self.state.served.refresh()
        except Exception as exc:   # a scan must never take the page down; say why instead
            self.live_note.object = f"Looking for new snapshots failed: {exc}"
            return
        self.state.follow()

    def _update_live_note(self, *events):
        pending = self.state.served.pending
        if not pending:
            self.live_note.object = ""
            return
        labels = [p.split(":", 1)[0] for p in pending]
        shown = ", ".join(labels[:3]) + (f" and {len(labels) - 3} more" if len(labels) > 3 else "")
        self.live_note.object = (f"Not shown yet: {shown} (still being written or unreadable; "
                                 f"picked up once complete)")

    # URL / link -------------------------------------------------------------------
    def set_base_url(self, base: str):
        self._base_url = base
        self._update_link()

    def _update_link(self, *events):
        self.link_text.value = self.state.link(self._base_url)

    # messages ---------------------------------------------------------------------
    def _check_snapshot(self, *events):
        s = self.state
        try:
            frame = s.frame()
            # the columns of the spatial view are read now anyway; a damaged dataset shows here
            for col in (s.space_x, s.space_y):
                if col:
                    frame[col]
        except SwarmAuditError as exc:
            self.problem.object = f"**Snapshot {s.snapshot} cannot be shown.** {exc}"
            self.problem.visible = True
            return
        self.problem.visible = False

    def _update_selection_info(self, *events):
        s = self.state
        if not s.select_box or not s.select_view:
            self.selection_info.object = ("Draw a box with the **box select** tool in either "
                                          "view to pick particles.")
            return
        try:
            frame = s.frame()
            xcol, ycol = self._axes(s.select_view)
            mask = render.box_mask(frame, xcol, ycol, s.select_box)
            n, w = render.selection_summary(frame, mask)
        except SwarmAuditError as exc:
            self.selection_info.object = f"Selection unavailable: {exc}"
            return
        total = max(frame.length, 1)
        self.selection_info.object = (f"**Selected** in {s.select_view}: **{n:,}** particles "
                                      f"({100.0 * n / total:.2f} %), summed weight **{w:.6g}**")

    # the two particle views ---------------------------------------------------------
    def _axes(self, which):
        s = self.state
        return (s.space_x, s.space_y) if which == "space" else (s.phase_x, s.phase_y)

    def _ranges(self, which):
        s = self.state
        return (s.space_xr, s.space_yr) if which == "space" else (s.phase_xr, s.phase_yr)

    def _store_ranges(self, which, xr_, yr_):
        s = self.state
        xr_ = tuple(float(v) for v in xr_) if xr_ is not None else None
        yr_ = tuple(float(v) for v in yr_) if yr_ is not None else None
        if which == "space":
            s.param.update(space_xr=xr_, space_yr=yr_)
        else:
            s.param.update(phase_xr=xr_, phase_yr=yr_)

    def _block_axes(self, frame, xcol, ycol, layout):
        """Layout axis numbers of the two columns, when both are position axes."""
        pos = frame.position_names
        if xcol in pos and ycol in pos:
            a, b = pos.index(xcol), pos.index(ycol)
            if max(a, b) < layout.ndim and a != b:
                return a, b
        return None

    def render_view(self, which, x_range=None, y_range=None, snapshot=None, slab_range=None,
                    select_box=None, select_view=None, **_):
        """One frame of a particle view (the DynamicMap callback); never raises."""
        try:
            return self._render_view(which, x_range, y_range, snapshot, slab_range, select_box,
                                     select_view)
        except Exception as exc:   # a view must not take the page down: a message, one log line
            log.error("%s view could not be drawn: %s: %s", which, type(exc).__name__, exc)
            self._status[which].object = "⚠ this view could not be drawn (the server's log says why)"
            return self._empty_overlay(which, (0, 1), (0, 1), "this view could not be drawn")

    def _render_view(self, which, x_range, y_range, snapshot, slab_range, select_box, select_view):
        s = self.state
        status = self._status[which]
        zoom = x_range is not None and y_range is not None
        j = s.snapshot if snapshot is None else int(snapshot)
        try:
            frame = s.frame(j)
            ref_i, ref_frame, ref_problem = self._reference(j, which)
            frames = [frame] + ([ref_frame] if ref_frame is not None else [])
            # one canvas for both runs: ranges and grid shared, whichever of them is shown
            view = view_policy.particle_view(s, which, frame=frame, snapshot=snapshot, frames=frames,
                                             x_range=x_range if zoom else None,
                                             y_range=y_range if zoom else None,
                                             slab_range=slab_range)
            if zoom and not view.notes:
                self._store_ranges(which, view.x_range, view.y_range)
            show = s.showing
            if show != "candidate" and ref_frame is None:
                status.object = f"⚠ {ref_problem}"
                return self._empty_overlay(which, view.x_range, view.y_range, ref_problem)
            view, agg = view_policy.state_shown(s, view, frame, ref_i, ref_frame)
        except SwarmAuditError as exc:
            status.object = f"⚠ {exc}"
            self.problem.object = f"**Snapshot {j} cannot be shown.** {exc}"
            self.problem.visible = True
            xr_ = tuple(x_range) if x_range and not view_policy.range_problem(x_range) else (0, 1)
            yr_ = tuple(y_range) if y_range and not view_policy.range_problem(y_range) else (0, 1)
            return self._empty_overlay(which, xr_, yr_, str(exc))
        img = view.difference_image(agg) if show == "difference" else view.image(agg)
        self.shown[which] = (view, agg)
        img = img.opts(backend="bokeh", width=VIEW_W, height=VIEW_H,
                       tools=["hover", "box_select"], active_tools=["wheel_zoom"],
                       bgcolor=PAPER, toolbar="above", fontsize={"title": "10.5pt"})
        # selection layer: the same particles, wherever the box was drawn (in the reference view,
        # the reference's particles in that box)
        drawn = ref_frame if show == "reference" else frame
        sel_img, box = self._selection_layer(drawn, which, view, select_box, select_view)
        if show == "candidate":
            blocks = self._blocks_layer(frame, which, view.xcol, view.ycol, s.served, j)
        else:         # the comparison counts both runs in the reference's blocks
            blocks = self._blocks_layer(ref_frame, which, view.xcol, view.ycol, s.reference_run,
                                        ref_i, counts=(show == "reference"))
        extra = ""
        if agg.attrs["nonfinite"]:
            extra = f" · **{agg.attrs['nonfinite']:,} with NaN/inf coordinates left out**"
        for note in view.notes:
            extra += f" · {note}"
        if ref_problem and show == "candidate":
            extra += f" · no reference here: {ref_problem}"
        ny, nx = agg.shape
        if show == "difference":
            d = np.asarray(agg.values)
            differs = np.isfinite(d).any() and np.nanmax(np.abs(d)) > 0
            _, hi = view_policy.difference_limits(d)
            status.object = (f"{view_policy.DIFFERENCE_MEANS}: {agg.attrs['particles']:,} and "
                             f"{agg.attrs['ref_particles']:,} particles binned on {nx}×{ny} bins, "
                             + (f"colours ±{hi:.4g}" if differs else "**no pixel differs**")
                             + extra)
        else:
            whose = f"{s.reference_label(ref_i)}: " if show == "reference" else ""
            status.object = f"{whose}{agg.attrs['particles']:,} particles binned on {nx}×{ny} bins{extra}"
        return img * sel_img * blocks * box

    def _reference(self, j, which):
        """(reference snapshot, its frame, None) paired with snapshot ``j``, or (None, None, why not)."""
        s = self.state
        if not s.reference:
            return None, None, None
        try:
            i, ref_frame = self.side.reference_frame(j)
            xcol, ycol = self._axes(which)
            missing = [c for c in (xcol, ycol) if c not in ref_frame]
            if missing:
                raise SwarmAuditError(f"{s.reference} has no column '{missing[0]}'")
        except SwarmAuditError as exc:
            return None, None, str(exc)
        return i, ref_frame, None

    def _empty_overlay(self, which, xr_, yr_, text):
        empty = hv.Image(np.full((2, 2), np.nan), bounds=(xr_[0], yr_[0], xr_[1], yr_[1]))
        empty = empty.opts(backend="bokeh", width=VIEW_W, height=VIEW_H, bgcolor=PAPER,
                           toolbar="above", tools=["box_select"])
        return (empty * hv.Image(np.full((2, 2), np.nan), bounds=(xr_[0], yr_[0], xr_[1], yr_[1]))
                * hv.Rectangles([]) * _message_element(text[:90], xr_, yr_))

    def _selection_layer(self, frame, which, view, select_box, select_view):
        x_range, y_range = view.x_range, view.y_range
        empty_box = hv.Rectangles([]).opts(backend="bokeh", fill_alpha=0, line_color="#e11d48")
        sx, sy = self._axes(select_view) if select_view else (None, None)
        # (a reference run drawn may lack the columns the box was drawn on)
        if not select_box or not select_view or sx not in frame or sy not in frame:
            nothing = hv.Image(np.zeros((2, 2)),
                               bounds=(x_range[0], y_range[0], x_range[1], y_range[1]))
            return _highlight(nothing), empty_box
        mask = render.box_mask(frame, sx, sy, select_box)
        agg = view.aggregate(frame, mask=mask)
        data = (np.asarray(agg.values) > 0).astype(np.float64)
        sel = _highlight(hv.Image((agg.coords[agg.dims[1]].values, agg.coords[agg.dims[0]].values,
                                   data), bounds=(x_range[0], y_range[0], x_range[1], y_range[1])))
        if select_view == which:
            x0, y0, x1, y1 = select_box
            box = hv.Rectangles([(x0, y0, x1, y1)]).opts(
                backend="bokeh", fill_alpha=0.0, line_color="#e11d48", line_width=2,
                line_dash="dashed")
        else:
            box = empty_box
        return sel, box

    def _blocks_layer(self, frame, which, xcol, ycol, served, snapshot, counts=True):
        """The layout of ``served`` at ``snapshot`` over the space view (census counts when
        ``counts`` and the state asks for them)."""
        s = self.state
        none = hv.Rectangles([]).opts(backend="bokeh", fill_alpha=0)
        if which != "space" or s.blocks == "off":
            return none
        try:
            layout = served.layout(snapshot)
        except SwarmAuditError:
            return none
        axes = self._block_axes(frame, xcol, ycol, layout)
        if axes is None:
            return none
        slab = None
        if s.slab_axis and s.slab_range and s.slab_axis in frame.position_names:
            k = frame.position_names.index(s.slab_axis)
            slab = (k, s.slab_range[0], s.slab_range[1])
        shown = counts and s.blocks in ("tinted", "labelled")
        counts = self.side.block_counts(snapshot, served) if shown else None
        return render.block_overlay(layout, counts=counts, labels=shown and s.blocks == "labelled",
                                    axes=axes, slab=slab, line_color=BLOCK_LINE)

    @param.depends("state.run", "state.species", "state.space_x", "state.space_y",
                   "state.blocks", "state.cmap", "state.scaling", "state.color_by",
                   "state.color_column", "state.slab_axis", "state.reference", "state.pair_by",
                   "state.show", "reset_count")
    def space_view(self):
        return self._view("space")

    @param.depends("state.run", "state.species", "state.phase_x", "state.phase_y",
                   "state.cmap", "state.scaling", "state.color_by", "state.color_column",
                   "state.slab_axis", "state.reference", "state.pair_by", "state.show",
                   "reset_count")
    def phase_view(self):
        return self._view("phase")

    def _view(self, which):
        s = self.state
        streams = [hv.streams.RangeXY(),
                   hv.streams.Params(s, ["snapshot", "slab_range", "select_box", "select_view",
                                         "data_revision"])]
        dmap = hv.DynamicMap(lambda **kw: self.render_view(which, **kw), streams=streams)
        bounds = hv.streams.BoundsXY(source=dmap, bounds=None)
        bounds.add_subscriber(lambda bounds: self._selected(which, bounds))
        return pn.pane.HoloViews(dmap, backend="bokeh", linked_axes=False, styles=VIEW_STYLE,
                                 margin=(0, 4))

    def _selected(self, which, bounds):
        if bounds is None:
            return
        x0, y0, x1, y1 = (float(v) for v in bounds)
        if not (x1 > x0 and y1 > y0):
            return
        self.state.param.update(select_view=which, select_box=(x0, y0, x1, y1))

    def reset_zoom(self, *_):
        s = self.state
        s.param.update(space_xr=None, space_yr=None, phase_xr=None, phase_yr=None)
        self.reset_count += 1

    def clear_selection(self, *_):
        self.state.param.update(select_box=None, select_view="")

    # navigation and controls --------------------------------------------------------
    def snapshot_label(self):
        return pn.bind(lambda i, run, rev: f"<div class='sa-snaplabel'>{_html(self.state.served.describe(i))}"
                       f" <span class='sa-of'>of {self.state.nsnapshots}</span></div>",
                       self.state.param.snapshot, self.state.param.run, self.state.param.run_revision)

    def controls(self):
        s = self.state
        n = s.nsnapshots
        player = pn.widgets.Player(label="", start=0, end=max(n - 1, 1), value=s.snapshot,
                                   interval=900, loop_policy="once", show_loop_controls=False,
                                   disabled=n < 2, sizing_mode="stretch_width",
                                   scale_buttons=0.85,
                                   visible_buttons=["first", "previous", "pause", "play", "next",
                                                    "last"], margin=(0, 10))

        def to_state(e):
            if s.snapshot != e.new and 0 <= e.new < s.nsnapshots:
                s.snapshot = e.new
        player.param.watch(to_state, "value")
        s.param.watch(lambda e: setattr(player, "value", e.new) if player.value != e.new else None,
                      "snapshot")

        def on_run(e):
            m = s.nsnapshots
            player.param.update(end=max(m - 1, 1), disabled=m < 2, value=s.snapshot)
        s.param.watch(on_run, ["run", "run_revision"])

        run_select = pn.widgets.Select.from_param(s.param.run, label=LABELS["run"],
                                                  sizing_mode="stretch_width")
        run_select.visible = len(self.server.runs) > 1
        w = {}
        for p in ("species", "space_x", "space_y", "phase_x", "phase_y", "color_column"):
            w[p] = pn.widgets.Select.from_param(s.param[p], label=LABELS[p],
                                                sizing_mode="stretch_width")
        color = pn.widgets.RadioButtonGroup.from_param(
            s.param.color_by, options={v: k for k, v in COLOR_BY_LABELS.items()},
            color="light", sizing_mode="stretch_width")
        scale = pn.widgets.RadioButtonGroup.from_param(
            s.param.scaling, options={v: k for k, v in SCALING_LABELS.items()},
            color="light", sizing_mode="stretch_width")
        cmap = pn.widgets.Select.from_param(s.param.cmap, label=LABELS["cmap"], options=list(CMAPS),
                                            sizing_mode="stretch_width")
        blocks = pn.widgets.RadioButtonGroup.from_param(s.param.blocks,
                                                        options={v: k for k, v in BLOCK_MODE_LABELS.items()},
                                                        color="light",
                                                        sizing_mode="stretch_width")
        w["color_column"].visible = s.color_by == "mean"
        s.param.watch(lambda e: setattr(w["color_column"], "visible", e.new == "mean"), "color_by")
        slab_box = self._slab_controls()
        whole = pn.widgets.Button(label=LABELS["reset_zoom"], color="default",
                                  sizing_mode="stretch_width")
        whole.on_click(self.reset_zoom)
        clear = pn.widgets.Button(label=LABELS["clear_selection"], color="default",
                                  sizing_mode="stretch_width")
        clear.on_click(self.clear_selection)
        return pn.Column(
            run_select,
            pn.pane.HTML(self.snapshot_label(), stylesheets=[_PANE_CSS], margin=(6, 10, 0, 10)),
            player,
            self.live_note,
            w["species"],
            _section(SECTIONS["axes"]),
            pn.Row(w["space_x"], w["space_y"], sizing_mode="stretch_width"),
            pn.Row(w["phase_x"], w["phase_y"], sizing_mode="stretch_width"),
            slab_box,
            _section(SECTIONS["colour"]),
            color, w["color_column"], scale, cmap,
            _section(SECTIONS["blocks"]),
            blocks,
            _section(SECTIONS["selection"]),
            self.selection_info,
            pn.Row(whole, clear, sizing_mode="stretch_width"),
            self._compare_controls(),
            width=330, styles=CONTROLS_STYLE, margin=0,
        )

    def _compare_controls(self):
        """The reference run, how snapshots pair, what the views show; hidden with one run."""
        s = self.state

        def options():
            return {NO_REFERENCE: "", **{n: n for n in s.param.reference.objects if n}}
        pick = pn.widgets.Select(label=LABELS["reference"], options=options(), value=s.reference,
                                 sizing_mode="stretch_width")
        pick.param.watch(lambda e: s.param.update(reference=e.new) if e.new != s.reference else None,
                         "value")

        def on_state(*_):
            pick.param.update(options=options(), value=s.reference)
        s.param.watch(on_state, ["run", "reference"])
        pair = pn.widgets.RadioButtonGroup.from_param(
            s.param.pair_by, options={v: k for k, v in PAIR_LABELS.items()}, color="light",
            sizing_mode="stretch_width")
        show = pn.widgets.RadioButtonGroup.from_param(
            s.param.show, options={v: k for k, v in SHOW_LABELS.items()}, color="light",
            sizing_mode="stretch_width")
        pairing = pn.pane.Markdown("", styles=STATUS_STYLE, margin=(0, 10), width=300)

        def on_reference(*_):
            pair.disabled = show.disabled = not s.reference
            pairing.object = self._pairing_note()
        s.param.watch(on_reference, ["run", "reference", "pair_by", "snapshot", "run_revision"])
        on_reference()
        box = pn.Column(_section(SECTIONS["compare"]), pick,
                        pn.pane.HTML(f"<div class='sa-small'>{_html(LABELS['pair_by'])}</div>",
                                     stylesheets=[_PANE_CSS], margin=(4, 10, 0, 10)), pair,
                        pn.pane.HTML(f"<div class='sa-small'>{_html(LABELS['show'])}</div>",
                                     stylesheets=[_PANE_CSS], margin=(4, 10, 0, 10)), show,
                        pairing, sizing_mode="stretch_width", margin=0)
        box.visible = len(s.param.reference.objects) > 1
        return box

    def _pairing_note(self) -> str:
        s = self.state
        if not s.reference:
            return ""
        try:
            i = self.side.reference_snapshot(s.snapshot)
        except SwarmAuditError as exc:
            return f"⚠ {exc}"
        return f"paired with {_html(s.reference)} {_html(s.reference_run.describe(i))}"

    def _slab_controls(self):
        s = self.state
        box = pn.Column(sizing_mode="stretch_width", margin=0)

        def rebuild(*_):
            if not s.slab_axis:
                box.objects = []
                return
            try:
                lo, hi = render.data_range(s.frame(), s.slab_axis)
            except SwarmAuditError:
                box.objects = []
                return
            lo, hi = render.padded_range(lo, hi)
            hi = hi + (hi - lo) * 1e-9
            value = s.slab_range or (lo, hi)
            slider = pn.widgets.RangeSlider(label=f"Slab of {s.slab_axis}", start=lo, end=hi,
                                            value=(max(lo, value[0]), min(hi, value[1])),
                                            step=(hi - lo) / 200, sizing_mode="stretch_width")
            slider.param.watch(lambda e: s.param.update(slab_range=tuple(e.new)), "value_throttled")
            box.objects = [slider]
        s.param.watch(rebuild, ["slab_axis", "run", "species"])
        rebuild()
        return box

    def header(self):
        s = self.state
        copy = pn.widgets.Button(label=LABELS["copy_link"], color="warning", width=120,
                                 margin=(14, 12, 8, 4))
        copy.js_on_click(args={"box": self.link_text}, code="""
const url = window.location.href;
function fallback() {
  const ta = document.createElement('textarea');
  ta.value = url; document.body.appendChild(ta); ta.select();
  try { document.execCommand('copy'); } catch (e) {}
  ta.remove();
}
if (navigator.clipboard && window.isSecureContext) {
  navigator.clipboard.writeText(url).catch(fallback);
} else { fallback(); }
box.value = url;
""")
        title = pn.bind(lambda run: f"<div class='sa-brand'><span class='sa-mark'>◆</span> "
                        f"swarmaudit</div><div class='sa-run'>run: {_html(run)}</div>",
                        s.param.run)
        return pn.Row(pn.pane.HTML(title, stylesheets=[_PANE_CSS], margin=(4, 12)),
                      pn.layout.HSpacer(),
                      pn.Column(pn.pane.HTML("<span style='color:#cfe3e3;font-size:11px'>link to "
                                             "this view</span>", margin=(2, 10, 0, 10)),
                                self.link_text, width=560, margin=(0, 4)), copy,
                      styles=HEADER_STYLE, sizing_mode="stretch_width", margin=0)

    def views(self):
        return pn.Row(
            pn.Column(pn.panel(self.space_view, defer_load=False), self._status["space"],
                      margin=(0, 6)),
            pn.Column(pn.panel(self.phase_view), self._status["phase"], margin=(0, 6)),
            margin=(4, 0))

    def page(self):
        body = pn.Column(self.link_note, self.problem, self.views(), self.side.tabs(), margin=(0, 8))
        return pn.Column(
            self.header(),
            pn.Row(self.controls(), body, margin=0),
            stylesheets=[_css()], styles=PAGE_STYLE, margin=0, sizing_mode="stretch_width",
        )


#: styles inside HTML panes (each pane has its own shadow root, the page's sheet stops at it)
_PANE_CSS = """
.sa-brand { font-size: 21px; font-weight: 700; letter-spacing: 0.04em; color: #f7f4ec; }
.sa-mark { color: #e9c46a; }
.sa-run { font-size: 12.5px; color: #cfe3e3; font-family: "DejaVu Sans Mono", monospace; }
.sa-section { font-size: 11px; font-weight: 700; text-transform: uppercase;
  letter-spacing: 0.09em; color: #0b6668; border-bottom: 1px solid #e4e0d8; padding-bottom: 2px;
  width: 300px; }
.sa-snaplabel { font-size: 14px; font-weight: 600; color: #1d2433;
  font-family: "DejaVu Sans Mono", monospace; }
.sa-of { font-weight: 400; color: #5b6473; font-size: 12px; }
.sa-small { font-size: 12px; color: #5b6473; }
"""


def _section(text: str):
    return pn.pane.HTML(f"<div class='sa-section'>{_html(text)}</div>", stylesheets=[_PANE_CSS],
                        margin=(10, 10, 0, 10))


def _html(text) -> str:
    import html
    return html.escape(str(text))


def build_page(server: ServerState, query: dict | None = None, base_url: str = ""):
    """The page of one session of ``server``; ``query`` is the URL query (validated key by key)."""
    state = ViewState(server.runs)
    if query:
        state.apply_query(query)
    dash = Dashboard(state, server)
    dash.set_base_url(base_url)
    return dash, dash.page()
