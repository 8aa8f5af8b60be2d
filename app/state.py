"""What the dashboard shows, as one parameterized object, and what a server shares.

:class:`ViewState` holds the whole view (run, snapshot, species, axes, ranges,
colouring, overlays, side panel, selection). A shared link is that state
written into the URL query; :meth:`ViewState.apply_query` reads it back one
key at a time and refuses what it does not know, so no URL can name a file.

:class:`ServerState` is what one server shares between its sessions: the
runs it was started with (:class:`ServedRuns`; a run's columns are read once,
whatever the number of viewers) and the results of slow work
(:class:`Results`). Whoever serves pages makes one (``serve``, a notebook's
``view()``, a test) and hands it to every page it builds.
"""

from __future__ import annotations

import json
import math
import threading
import time
from collections import OrderedDict
from concurrent.futures import Future, ThreadPoolExecutor
from urllib.parse import parse_qsl, urlencode

import param

from ..audit.compare import PAIR_BY
from ..core.errors import InputError, SwarmAuditError
from ..core.frame import concat_frames
from .view_policy import (BLOCK_MODE_LABELS, CMAPS, COLOR_BY, DEFAULT_CMAP, DEFAULT_SCALING,
                          PANEL_ALIASES, PANELS, SCALINGS, SHOW_LABELS, default_axes, opening_range,
                          range_problem, snapshot_label_of)

ALL_SPECIES = "all"
#: a served run's folders are listed again at most this often (seconds), however many viewers
SCAN_SECONDS = 3.0

BLOCK_MODES = tuple(BLOCK_MODE_LABELS)
#: side panels, in the order of their tabs
SIDE_PANELS = tuple(PANELS)
SELECT_VIEWS = ("", "space", "phase")
#: what the particle views show when a reference run is chosen
SHOWS = tuple(SHOW_LABELS)
#: longest value a link may carry for one key; longer ones are dropped unread (a number of
#: thousands of digits would otherwise meet Python's limit on int parsing)
MAX_QUERY_VALUE = 256
#: the range parameters of the state and the view and axis each belongs to
RANGE_AXES = {"space_xr": ("space", 0), "space_yr": ("space", 1),
              "phase_xr": ("phase", 0), "phase_yr": ("phase", 1)}

#: state parameter -> URL query key (short, stable: these are what links carry)
URL_KEYS = {
    "run": "run",
    "reference": "ref", "pair_by": "pair", "show": "show",
    "snapshot": "snap",
    "species": "sp",
    "space_x": "sx", "space_y": "sy",
    "phase_x": "px", "phase_y": "py",
    "space_xr": "sxr", "space_yr": "syr",
    "phase_xr": "pxr", "phase_yr": "pyr",
    "color_by": "color", "color_column": "ccol",
    "scaling": "scale", "cmap": "cmap",
    "slab_axis": "slab", "slab_range": "slabr",
    "blocks": "blocks",
    "side": "tab",
    "compare_to": "cmp",
    "rtol": "rtol",
    "hist_column": "hcol",
    "select_view": "selv", "select_box": "sel",
}

# Order in which a query is applied: what decides the choices of later keys first.
_APPLY_ORDER = ("run", "reference", "pair_by", "show", "snapshot", "species", "space_x", "space_y", "phase_x", "phase_y",
                "space_xr", "space_yr", "phase_xr", "phase_yr", "color_by", "color_column",
                "scaling", "cmap", "slab_axis", "slab_range", "blocks", "side", "compare_to",
                "rtol", "hist_column", "select_view", "select_box")


# ---------------------------------------------------------------------------
class ServedRun:
    """One run a server shows: its context plus a small window of opened snapshots."""

    def __init__(self, name: str, ctx, keep_open: int = 6, roots: list[str] | None = None):
        self.name = name
        self.ctx = ctx
        self.run = ctx.run
        self.keep_open = max(2, int(keep_open))
        self.roots = list(roots or [])     # snapshots resolving outside these are never served
        self._lock = threading.RLock()
        self._recent: OrderedDict[int, None] = OrderedDict()
        self._all: dict[int, object] = {}
        self._errors: dict[int, str] = {}
        self.version = 0                   # bumped whenever a rescan changed the run
        self.epoch = 0                     # bumped when snapshots were re-opened or moved (not appended)
        self.scans = 0                     # rescans that listed the folders (not rate-limited away)
        self._last_scan = time.monotonic()
        self._scan_lock = threading.Lock()

    # a run still being written ------------------------------------------------------
    def refresh(self, min_interval: float = SCAN_SECONDS) -> bool:
        """List the run's folders again (at most every ``min_interval`` s); True if the run changed.

        New snapshots join the run in place, so every session sees them;
        unchanged snapshots keep their read columns; a snapshot whose files
        changed is re-opened. Safe to call from every session: one scan at a time.
        """
        if self.run.spec is None:
            return False
        if not self._scan_lock.acquire(blocking=False):
            return False                   # another session is scanning right now
        try:
            if time.monotonic() - self._last_scan < min_interval:
                return False
            self._last_scan = time.monotonic()
            self.scans += 1
            from ..readers.discover import rescan_run
            allow = None
            if self.roots:
                from .confine import outside_note
                allow = lambda ref: outside_note(ref, self.roots)   # noqa: E731
            with self._lock:
                before = self.pending
                try:
                    change = rescan_run(self.run, allow=allow)
                except SwarmAuditError:
                    return False           # folder gone for a moment (moved, remounted): keep what is shown
                if not change.any:
                    if self.pending == before:
                        return False
                    self.version += 1      # only the notes changed (a snapshot started or failed)
                    return True
                moved = change.moved
                self._recent = OrderedDict((moved[i], None) for i in self._recent if i in moved)
                # "all species" frames and remembered errors of kept, unchanged snapshots stay
                self._all = {moved[i]: f for i, f in self._all.items() if i in moved}
                self._errors = {moved[i]: e for i, e in self._errors.items() if i in moved}
                self.version += 1
                if change.changed or change.removed or any(a != b for a, b in moved.items()):
                    self.epoch += 1        # results kept by position are stale
                return True
        finally:
            self._scan_lock.release()

    @property
    def pending(self) -> list[str]:
        """Notes on snapshots left out for now (still being written, unreadable)."""
        return list(self.run.skipped)

    def key(self, i: int) -> tuple:
        """What names snapshot ``i`` across rescans (its position may change)."""
        from ..readers.discover import ref_key
        return ref_key(self.run.refs[int(i)])

    def index_of(self, key) -> int | None:
        from ..readers.discover import ref_key
        for j, ref in enumerate(self.run.refs):
            if ref_key(ref) == key:
                return j
        return None

    def stamp(self, i: int) -> tuple:
        """Identity of the content of snapshot ``i``: its files' sizes and mtimes when opened."""
        refs = self.run.refs
        if not 0 <= int(i) < len(refs):
            return ()
        ref = refs[int(i)]
        return (tuple(ref.paths), ref.stamp)

    def __len__(self) -> int:
        return len(self.run)

    @property
    def labels(self) -> list[str]:
        return self.run.labels

    def snapshot(self, i: int):
        """Snapshot ``i`` (read once); a snapshot that cannot be read raises InputError."""
        i = int(i)
        if not 0 <= i < len(self.run):
            raise InputError(self.run.source, f"has no snapshot {i} (it has {len(self.run)})")
        with self._lock:
            if i in self._errors:
                raise InputError(self.run.refs[i].path, self._errors[i])
            try:
                snap = self.run[i]
            except SwarmAuditError as exc:
                self._errors[i] = getattr(exc, "problem", None) or str(exc)
                raise
            except (OSError, ValueError, KeyError) as exc:
                self._errors[i] = f"cannot be read ({type(exc).__name__}: {exc})"
                raise InputError(self.run.refs[i].path, self._errors[i]) from None
            self._recent[i] = None
            self._recent.move_to_end(i)
            # keep memory flat over a long run: older snapshots drop their columns
            while len(self._recent) > self.keep_open:
                old, _ = self._recent.popitem(last=False)
                self._all.pop(old, None)
                self.run.forget(old)
            return snap

    def species_names(self, i: int) -> list[str]:
        names = list(self.snapshot(i).species)
        if self.ctx.species:
            names = [s for s in names if s in self.ctx.species]
        return names + ([ALL_SPECIES] if len(names) > 1 else [])

    def frame(self, i: int, species: str):
        """The frame of one species, or every species joined (``all``)."""
        snap = self.snapshot(i)
        if species != ALL_SPECIES:
            return snap.frame(species)
        with self._lock:
            if i not in self._all:
                names = [s for s in self.species_names(i) if s != ALL_SPECIES]
                parts = [snap.frame(s) for s in names]
                self._all[i] = concat_frames(parts, species=ALL_SPECIES, source=snap.path)
            return self._all[i]

    def layout(self, i: int):
        with self._lock:
            return self.ctx.layout(int(i))

    def describe(self, i: int) -> str:
        """Label of a snapshot for the slider: position, step, time."""
        if not 0 <= int(i) < len(self.run):
            return f"#{i} (not in the run any more)"
        try:
            snap = self.snapshot(i)
        except SwarmAuditError:
            return f"#{i} {self.labels[i]} (unreadable)"
        return snapshot_label_of(snap, int(i))


class ServedRuns:
    """The runs one server process shows, by name; unknown names are refused."""

    def __init__(self, runs: "OrderedDict[str, ServedRun] | None" = None):
        self._runs: OrderedDict[str, ServedRun] = OrderedDict(runs or {})

    def add(self, name: str, ctx, roots: list[str] | None = None) -> ServedRun:
        base, k = name, 2
        while name in self._runs:
            name, k = f"{base}-{k}", k + 1
        self._runs[name] = ServedRun(name, ctx, roots=roots)
        return self._runs[name]

    def refresh(self, min_interval: float = SCAN_SECONDS) -> list[str]:
        """Rescan every served run; the names of those that changed."""
        return [name for name, r in self._runs.items() if r.refresh(min_interval)]

    @property
    def names(self) -> list[str]:
        return list(self._runs)

    def __getitem__(self, name: str) -> ServedRun:
        if name not in self._runs:
            raise KeyError(name)
        return self._runs[name]

    def __len__(self) -> int:
        return len(self._runs)


class Results:
    """Results of work shared by the sessions of one server.

    ``submit(key, fn)`` starts slow work (drift over a run, migration between
    two snapshots) in a worker thread once per key; every session asking for
    the same key gets the same future, and a revisit is instant.
    ``cached(key, compute)`` keeps a quick per-snapshot answer (a census, a
    pairing) computed where it is asked for.
    """

    #: quick answers kept before the oldest are let go
    KEEP = 512

    def __init__(self, workers: int = 2):
        self._pool = ThreadPoolExecutor(max_workers=workers, thread_name_prefix="swarmaudit")
        self._futures: dict[tuple, Future] = {}
        self._progress: dict[tuple, float] = {}
        self._lock = threading.Lock()
        self._small: dict = {}
        self._small_lock = threading.Lock()

    def submit(self, key: tuple, fn, *args) -> Future:
        with self._lock:
            fut = self._futures.get(key)
            if fut is None or (fut.done() and fut.exception() is not None and _retry(fut)):
                self._progress[key] = 0.0
                fut = self._pool.submit(self._run, key, fn, *args)
                self._futures[key] = fut
            return fut

    def _run(self, key, fn, *args):
        def progress(done, total):
            self._progress[key] = (done / total) if total else 1.0
        return fn(*args, progress=progress)

    def progress(self, key) -> float:
        return self._progress.get(key, 0.0)

    def get(self, key):
        fut = self._futures.get(key)
        return fut.result() if fut is not None and fut.done() else None

    def pending(self) -> list[Future]:
        """The futures of work not finished yet."""
        with self._lock:
            return [f for f in self._futures.values() if not f.done()]

    def cached(self, key, compute):
        """``compute()`` once per key (a failure is not kept: it raises again next time)."""
        with self._small_lock:
            if key in self._small:
                return self._small[key]
        value = compute()
        with self._small_lock:
            if len(self._small) > self.KEEP:
                self._small.clear()
            self._small[key] = value
        return value

    def clear(self) -> None:
        with self._lock:
            self._futures.clear()
            self._progress.clear()
        with self._small_lock:
            self._small.clear()


def _retry(fut: Future) -> bool:
    # a user error (bad snapshot) will not heal; anything else may have been transient
    return not isinstance(fut.exception(), SwarmAuditError)


class ServerState:
    """What one server shares between its sessions: the runs it serves and the results of work.

    Every page of the server is built around the same object (handed to
    :func:`.dashboard.build_page`); two servers in one process (tests, a
    notebook beside ``serve``) share nothing.
    """

    def __init__(self, runs: ServedRuns | None = None, workers: int = 2):
        self.runs = runs if runs is not None else ServedRuns()
        self.results = Results(workers)

    def add(self, name: str, ctx, roots: list[str] | None = None) -> ServedRun:
        """Serve one more run (a taken name gets a suffix); the served run."""
        return self.runs.add(name, ctx, roots=roots)


# ---------------------------------------------------------------------------
class ViewRange(param.Range):
    """A range of a view: None, or two finite numbers, the second above the first.

    Checked on every set, so no caller (a link, the page's own location sync,
    a widget) can hand the views a range they cannot bin.
    """

    def _validate_value(self, val, allow_None):
        super()._validate_value(val, allow_None)
        if val is not None:
            problem = range_problem(val)
            if problem:
                raise ValueError(f"{self.name}: {problem}, got {val!r}")


class SelectionBox(param.NumericTuple):
    """(x0, y0, x1, y1) of a selection: finite, x1 above x0 and y1 above y0."""

    def _validate_value(self, val, allow_None):
        super()._validate_value(val, allow_None)
        if val is not None:
            if len(val) != 4:
                raise ValueError(f"{self.name}: a selection is four numbers, got {val!r}")
            problem = range_problem((val[0], val[2])) or range_problem((val[1], val[3]))
            if problem:
                raise ValueError(f"{self.name}: {problem}, got {val!r}")


class ViewState(param.Parameterized):
    """The whole view of one dashboard session; what a shared link encodes.

    Every choice is a Selector that checks on set (its list is filled from the
    served runs and their columns), so a value from a URL that is not on the
    list is refused by the parameter itself, whoever sets it.
    """

    run = param.Selector(check_on_set=True, objects=[], doc="name of the run shown (one of the served runs)")
    reference = param.Selector(check_on_set=True, default="", objects=[""],
                               doc="served run the run in view is compared with ('': none)")
    pair_by = param.Selector(check_on_set=True, default="step", objects=list(PAIR_BY),
                             doc="how the reference's snapshots pair with the run's (audit.compare)")
    show = param.Selector(check_on_set=True, default="candidate", objects=list(SHOWS),
                          doc="the particle views draw the run in view, the reference, or their difference")
    snapshot = param.Integer(0, bounds=(0, 0), doc="position of the snapshot in the run")
    species = param.Selector(check_on_set=True, objects=[], doc="species shown, or 'all'")
    space_x = param.Selector(check_on_set=True, objects=[], doc="horizontal axis of the spatial view")
    space_y = param.Selector(check_on_set=True, objects=[], doc="vertical axis of the spatial view")
    phase_x = param.Selector(check_on_set=True, objects=[], doc="horizontal axis of the phase-space view")
    phase_y = param.Selector(check_on_set=True, objects=[], doc="vertical axis of the phase-space view")
    space_xr = ViewRange(None, allow_None=True, doc="visible range of space_x (None: all)")
    space_yr = ViewRange(None, allow_None=True)
    phase_xr = ViewRange(None, allow_None=True)
    phase_yr = ViewRange(None, allow_None=True)
    color_by = param.Selector(check_on_set=True, default="count", objects=list(COLOR_BY),
                              doc="count per pixel, summed weight, or mean of color_column")
    color_column = param.Selector(check_on_set=True, objects=[], doc="column averaged when color_by is 'mean'")
    scaling = param.Selector(check_on_set=True, default=DEFAULT_SCALING, objects=list(SCALINGS))
    cmap = param.Selector(check_on_set=True, default=DEFAULT_CMAP, objects=list(CMAPS))
    slab_axis = param.Selector(check_on_set=True, default="", objects=[""], doc="third axis cut into a slab (3-D runs)")
    slab_range = ViewRange(None, allow_None=True, doc="lo <= slab_axis < hi")
    blocks = param.Selector(check_on_set=True, default="outline", objects=list(BLOCK_MODES))
    side = param.Selector(check_on_set=True, default="blocks", objects=list(SIDE_PANELS))
    compare_to = param.Integer(-1, bounds=(-1, None), doc="migration reference snapshot (-1: previous)")
    rtol = param.Number(1e-3, bounds=(0, None), inclusive_bounds=(False, True),
                        doc="tolerance band of the drift panel")
    hist_column = param.Selector(check_on_set=True, objects=[], doc="column of the 1-D histogram")
    select_view = param.Selector(check_on_set=True, default="", objects=list(SELECT_VIEWS))
    select_box = SelectionBox(None, length=4, allow_None=True,
                              doc="(x0, y0, x1, y1) of the selection in select_view's axes")
    # not in links: bumped when a live run's files change under this view
    run_revision = param.Integer(0, doc="bumped when snapshots joined or left the run in view")
    data_revision = param.Integer(0, doc="bumped when the files of the snapshot in view changed")

    def __init__(self, runs: ServedRuns, **params):
        self._runs = runs
        #: one sentence per link value that was left out (shown on the page)
        self.link_notes: list[str] = []
        names = self._runs.names
        if not names:
            raise SwarmAuditError("no run to show")
        self._adjusting = True     # no watcher runs before the choices exist
        super().__init__()
        self.param.run.objects = names     # per instance: sessions of other servers differ
        run = params.pop("run", names[0])
        self._reference_choices(run)
        self._adjusting = False
        if run == self.run:
            self._refresh_choices(reset_axes=True)
        else:
            self.run = run                 # the watcher fills the choices
        if self.run != run:
            raise ValueError(f"not a served run: {run!r}")
        if params:
            self.param.update(**params)
        self._seen_version = self.served.version
        self._remember_shown()

    # a run still being written ------------------------------------------------------
    def _remember_shown(self, *_):
        served = self.served
        if 0 <= self.snapshot < len(served):
            self._shown = (served.key(self.snapshot), served.stamp(self.snapshot))
        else:
            self._shown = (None, None)

    def follow(self) -> bool:
        """Catch up with a rescan of the served run (called periodically in each session).

        The slider's end follows the run's length; the snapshot in view stays
        the same snapshot when others are sorted in before it; views redraw
        only when the files of the snapshot in view changed. True if anything changed.
        """
        served = self.served
        if served.version == self._seen_version:
            return False
        key, stamp = self._shown
        j = served.index_of(key) if key is not None else None
        n = len(served)
        target = j if j is not None else min(self.snapshot, max(n - 1, 0))
        with param.parameterized.batch_call_watchers(self):
            self.param.snapshot.bounds = (0, max(n - 1, 0))
            self.param.compare_to.bounds = (-1, max(n - 1, 0))
            if self.compare_to > n - 1:
                self.compare_to = -1
            if target != self.snapshot:
                self.snapshot = target
        if j is None or served.stamp(j) != stamp:
            self._refresh_choices(reset_axes=False)
            self.data_revision += 1
        self.run_revision += 1
        self._seen_version = served.version
        self._remember_shown()
        return True

    # the run and frame in view ----------------------------------------------------
    @property
    def served(self) -> ServedRun:
        return self._runs[self.run]

    @property
    def nsnapshots(self) -> int:
        return len(self.served)

    def frame(self, snapshot: int | None = None):
        """The frame in view (raises InputError when the snapshot cannot be read)."""
        i = self.snapshot if snapshot is None else snapshot
        return self.served.frame(i, self.species)

    def columns(self) -> list[str]:
        try:
            f = self.frame()
        except SwarmAuditError:
            return []
        # every column is offered without reading it (a view must only read what it shows);
        # a column that cannot be drawn says so when it is chosen
        return list(f.columns)

    # choices that depend on the data ----------------------------------------------
    @param.depends("run", watch=True)
    def _on_run(self):
        self._reference_choices(self.run)
        self._refresh_choices(reset_axes=True)
        self._seen_version = self.served.version
        self._remember_shown()

    @param.depends("snapshot", "species", watch=True)
    def _on_data(self):
        self._refresh_choices(reset_axes=False)
        self._remember_shown()

    @param.depends("space_x", "space_y", watch=True)
    def _on_space_axes(self):
        if not self._adjusting:
            self.param.update(space_xr=None, space_yr=None, **self._drop_selection("space"))

    @param.depends("phase_x", "phase_y", watch=True)
    def _on_phase_axes(self):
        if not self._adjusting:
            self.param.update(phase_xr=None, phase_yr=None, **self._drop_selection("phase"))

    def _reference_choices(self, run: str) -> None:
        """A reference is any other served run (or none)."""
        others = [""] + [n for n in self._runs.names if n != run]
        self.param.reference.objects = others
        if self.reference not in others:
            self.reference = ""

    @property
    def reference_run(self) -> ServedRun | None:
        """The served run the run in view is compared with, or None."""
        return self._runs[self.reference] if self.reference else None

    @property
    def showing(self) -> str:
        """What the particle views draw: ``show``, or the candidate when no reference is chosen."""
        return self.show if self.reference else "candidate"

    def reference_label(self, i: int) -> str:
        """The reference run and its snapshot ``i``, as the views' titles and status name them."""
        return f"{self.reference} {self.reference_run.describe(i)}"

    def reference_pairing(self):
        """How the reference's snapshots pair with the run in view's (audit.compare.pair_snapshots,
        the rule of ``swarmaudit compare``), or None without a reference."""
        ref = self.reference_run
        if ref is None:
            return None
        from ..audit.compare import pair_snapshots
        return pair_snapshots(ref.ctx, self.served.ctx, self.pair_by)

    def reference_snapshot(self, j: int, pairing=None) -> int:
        """The reference snapshot paired with snapshot ``j`` of the run in view.

        ``pairing`` is ``reference_pairing()`` when the caller keeps one. Raises
        SwarmAuditError (worded for the page) when there is no reference, the runs cannot
        be paired, or snapshot ``j`` has no partner.
        """
        pairing = self.reference_pairing() if pairing is None else pairing
        if pairing is None:
            raise SwarmAuditError("no reference run is chosen")
        for i, jj in pairing.pairs:
            if jj == int(j):
                return i
        raise SwarmAuditError(f"snapshot {j} of {self.run} has no partner in {self.reference} "
                              f"(paired by {self.pair_by})")

    def reference_frame(self, j: int, pairing=None):
        """(reference snapshot, its frame of the species in view) paired with snapshot ``j``
        (``reference_snapshot``; SwarmAuditError also when the reference lacks the species)."""
        i = self.reference_snapshot(j, pairing)
        ref = self.reference_run
        if self.species != ALL_SPECIES and self.species not in ref.species_names(i):
            raise SwarmAuditError(f"species '{self.species}' is not in {self.reference}")
        return i, ref.frame(i, self.species)

    def _drop_selection(self, view):
        return {"select_box": None, "select_view": ""} if self.select_view == view else {}

    def _refresh_choices(self, reset_axes: bool):
        """Species, column and snapshot choices for the current run and snapshot."""
        if self._adjusting:
            return
        self._adjusting = True
        try:
            served = self.served
            n = len(served)
            self.param.snapshot.bounds = (0, max(n - 1, 0))
            if self.snapshot > n - 1:
                self.snapshot = max(n - 1, 0)
            self.param.compare_to.bounds = (-1, max(n - 1, 0))
            if self.compare_to > n - 1:
                self.compare_to = -1
            try:
                species = served.species_names(self.snapshot)
            except SwarmAuditError:
                species = [self.species] if self.species else []
            if not species:
                species = [""]
            self.param.species.objects = species
            if self.species not in species:
                # several species: show them together first (a two-beam run reads as one picture)
                self.species = ALL_SPECIES if ALL_SPECIES in species else species[0]
            cols = self.columns()
            try:
                frame = self.frame()
            except SwarmAuditError:
                frame = None
            if not cols:
                # an unreadable snapshot keeps the previous choices for when it comes back
                return
            for p in ("space_x", "space_y", "phase_x", "phase_y", "color_column", "hist_column"):
                self.param[p].objects = cols
            space, phase = default_axes(frame, cols)
            updates = {}
            for p, default in (("space_x", space[0]), ("space_y", space[1]),
                               ("phase_x", phase[0]), ("phase_y", phase[1])):
                if reset_axes or getattr(self, p) not in cols:
                    updates[p] = default
            weight = frame.column_for("weight") if frame is not None else None
            mom = frame.momentum_names() if frame is not None else []
            if reset_axes or self.color_column not in cols:
                updates["color_column"] = mom[0] if mom else cols[0]
            if reset_axes or self.hist_column not in cols:
                updates["hist_column"] = (mom[0] if mom else (weight or cols[0]))
            pos = frame.position_names if frame is not None else []
            slabs = [""] + (pos[2:] if len(pos) > 2 else [])
            self.param.slab_axis.objects = slabs
            if reset_axes or self.slab_axis not in slabs:
                updates["slab_axis"] = slabs[1] if len(slabs) > 1 else ""
                updates["slab_range"] = None
            if reset_axes:
                updates.update(space_xr=None, space_yr=None, phase_xr=None, phase_yr=None,
                               select_box=None, select_view="")
            if updates:
                self.param.update(**updates)
        finally:
            self._adjusting = False

    # links --------------------------------------------------------------------------
    def query(self) -> dict[str, str]:
        """The URL query of this view (values as the page writes them)."""
        out = {}
        for p, key in URL_KEYS.items():
            v = getattr(self, p)
            if v is None:
                continue
            out[key] = v if isinstance(v, str) else json.dumps(list(v) if isinstance(v, tuple) else v)
        return out

    def link(self, base: str) -> str:
        return f"{base}?{urlencode(self.query())}"

    def apply_query(self, query: dict) -> list[str]:
        """Set the state from a URL query, key by key; returns the keys refused.

        Values are checked against the choices the server offers (run names,
        column names, fixed option lists) and numeric bounds; a view range
        must be finite, ordered, non-empty and within a sane span of the data
        (view_policy.range_problem). Anything else is refused, the view keeps
        its default and ``link_notes`` gets one sentence about it. Nothing in
        a query is ever used as a path or evaluated.
        """
        inverse = {v: k for k, v in URL_KEYS.items()}
        refused = []
        wanted = {}
        for k, v in query.items():
            if k not in inverse:
                refused.append(k)
                if not any("key this page does not know" in n for n in self.link_notes):
                    self.link_notes.append("A link key this page does not know was left out.")
            elif isinstance(v, str) and len(v) > MAX_QUERY_VALUE:
                refused.append(k)
                self._note_refused(k, None, f"the value is longer than {MAX_QUERY_VALUE} characters")
            else:
                wanted[inverse[k]] = v
        if isinstance(wanted.get("side"), str):
            wanted["side"] = PANEL_ALIASES.get(wanted["side"], wanted["side"])
        # axis changes clear the view range and the selection; a link sets all of them at once
        for p in _APPLY_ORDER:
            if p not in wanted:
                continue
            try:
                value = _coerce(self.param[p], wanted[p])
                if p in RANGE_AXES and value is not None:
                    problem = self._range_problem(p, value)
                    if problem:
                        raise ValueError(problem)
                if p in ("space_x", "space_y", "phase_x", "phase_y"):
                    self._adjusting = True
                    try:
                        setattr(self, p, value)
                    finally:
                        self._adjusting = False
                else:
                    setattr(self, p, value)
            except (ValueError, TypeError, OverflowError, RecursionError) as exc:
                refused.append(URL_KEYS[p])
                self._note_refused(URL_KEYS[p], wanted[p], _reason(exc))
        return refused

    def _range_problem(self, p: str, value) -> str | None:
        """Why a range from a link cannot be drawn around the data in view (None: it can)."""
        which, axis = RANGE_AXES[p]
        col = (self.space_x, self.space_y)[axis] if which == "space" else (self.phase_x, self.phase_y)[axis]
        try:
            frame = self.frame()
            layout = self.served.layout(self.snapshot)
        except SwarmAuditError:
            return range_problem(value)
        return range_problem(value, opening_range([frame], col, layout))

    def _note_refused(self, key: str, value, why: str) -> None:
        # the value itself is never shown back: a page must not echo what a link carries
        self.link_notes.append(f"The link's '{key}' value was left out ({why}); the view shows "
                               f"its default there.")


def link_query(search: str) -> dict[str, str]:
    """The query of a page's address, as strings, read without converting any value.

    A value is only ever parsed by ``ViewState.apply_query``, which refuses
    one longer than MAX_QUERY_VALUE unread (a value of thousands of digits
    would otherwise reach Python's limit on int parsing and fail the page).
    """
    pairs = parse_qsl((search or "").lstrip("?"), keep_blank_values=True, max_num_fields=None)
    out = {}
    for k, v in pairs[:len(URL_KEYS) * 2]:
        out[k[:MAX_QUERY_VALUE]] = v if len(v) <= MAX_QUERY_VALUE else v[:MAX_QUERY_VALUE + 1]
    return out


def _reason(exc: Exception) -> str:
    text = str(exc).split(", got ")[0]
    if text.startswith("not a choice") or "does not accept" in text:
        return "not one of the choices this server offers"
    return text.split(": ", 1)[1] if text.startswith(tuple(URL_KEYS)) and ": " in text else text


def _coerce(p: param.Parameter, value):
    """A query value as the parameter's type, strictly (json numbers/lists only, no eval)."""
    if isinstance(value, str) and isinstance(p, (param.Range, param.NumericTuple, param.Number,
                                                 param.Integer)):
        if value in ("", "null", "None"):
            value = None
        else:
            value = json.loads(value)
    if isinstance(p, param.Selector):
        if value is None:
            raise ValueError("empty")
        value = str(value) if not isinstance(value, str) else value
        if value not in p.objects:
            raise ValueError(f"not a choice: {value!r}")
        return value
    if isinstance(p, param.Integer):
        if isinstance(value, bool) or not isinstance(value, (int, float)) or value != int(value):
            raise ValueError("not a whole number")
        return int(value)
    if isinstance(p, (param.Range, param.NumericTuple)):
        if value is None:
            return None
        if not isinstance(value, (list, tuple)):
            raise ValueError("not a list")
        vals = tuple(float(v) for v in value if not isinstance(v, bool))
        if len(vals) != len(value) or not all(math.isfinite(v) for v in vals):
            raise ValueError("a range needs finite numbers")
        if isinstance(p, param.Range) and (len(vals) != 2 or vals[1] <= vals[0]):
            raise ValueError("a range needs its upper end above its lower end")
        return vals
    if isinstance(p, param.Number):
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise ValueError("not a number")
        return float(value)
    raise ValueError("not settable from a link")
