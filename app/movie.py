"""``swarmaudit movie RUN --view space|phase --out FILE``: a run's evolution as one movie file.

A frame is the export's figure of that snapshot: the view policy's view
(``view_policy.make_view``: axis ranges, grid, colour map, labels and title,
as the export and the dashboard decide them), aggregated and drawn by
``mpl_figures`` (the export's drawing code).
Two things differ from a set of exported PNGs, on purpose:

- every snapshot is aggregated first, and one colour scale is made from all
  the frames together (for ``eq_hist`` the equalisation of every frame's bins
  pooled), so a colour means the same count in every frame and the movie
  does not flicker as the densest bin changes;
- the figure is laid out once (``mpl_figures.ImageFigure``, as the export
  draws the snapshots of a view); each further frame swaps the image's data
  and the title into it and redraws only those, instead of building a new
  figure per frame (``tests/test_movie.py`` checks the frames equal a figure
  built afresh).

MP4 is encoded with the ffmpeg that the ``imageio-ffmpeg`` wheel ships (no
system ffmpeg needed), GIF and WebP with Pillow.
"""

from __future__ import annotations

import math
import os
import time
from dataclasses import dataclass, field

import numpy as np

from ..core.errors import InputError, OptionError

#: file endings written, and the format each means
FORMATS = {".mp4": "mp4", ".gif": "gif", ".webp": "webp"}
MIME = {"mp4": "video/mp4", "gif": "image/gif", "webp": "image/webp"}
DEFAULT_FPS = 8.0
#: libx264 quality on imageio-ffmpeg's 0..10 scale (8: crf about 10, visually lossless for figures)
MP4_QUALITY = 8
WEBP_QUALITY = 90


@dataclass
class MovieResult:
    """What a movie holds: its file, view, species, columns, snapshots and the one colour scale."""

    path: str
    view: str
    species: str
    columns: tuple[str, str]
    snapshots: list[int]
    scaling: str
    scale: tuple[float, float]          # the colour scale's ends, shared by every frame
    size: tuple[int, int]               # (width, height) pixels of a frame
    fps: float
    seconds: float = 0.0
    notes: list[str] = field(default_factory=list)

    @property
    def frames(self) -> int:
        return len(self.snapshots)

    def __repr__(self) -> str:
        return (f"<movie {self.path}: {self.frames} frames of the {self.view} view "
                f"({self.columns[0]}, {self.columns[1]}) of {self.species}, {self.scaling} colour "
                f"scale {self.scale[0]:g} … {self.scale[1]:g}, {self.size[0]}×{self.size[1]} "
                f"at {self.fps:g} fps>")


def movie_format(path) -> str:
    ext = os.path.splitext(os.fspath(path))[1].lower()
    if ext not in FORMATS:
        raise OptionError(f"--out {path}: a movie file ends in .mp4, .gif or .webp")
    return FORMATS[ext]


def check_fps(fps) -> float:
    try:
        v = float(fps)
    except (TypeError, ValueError):
        v = float("nan")
    if not (0 < v <= 120):
        raise OptionError(f"--fps takes a number of frames per second above 0 and up to 120, got '{fps}'")
    return v


# the frames ----------------------------------------------------------------------------------
class MovieFrames:
    """The view ``which`` of ``species`` in each of ``positions``, on one colour scale.

    ``aggregate()`` bins every snapshot (one pass each, columns dropped
    after); ``norm`` is then the shared colour scale; ``pixels()`` yields
    the RGB frames; ``still(k)`` draws frame ``k`` as a figure built afresh.
    """

    def __init__(self, ctx, which: str, positions: list[int], opts, species: str | None = None):
        from . import view_policy as policy
        if which not in ("space", "phase"):
            raise OptionError(f"--view takes space or phase, got '{which}'")
        self.ctx, self.which, self.opts = ctx, which, opts
        names = ctx.species_names()
        if species is not None:
            if species not in names:
                raise InputError(ctx.run.source, f"no species {species} in this run",
                                 f"species are: {', '.join(names)}")
            names = [species]
        self.species_names = names
        self.label = names[0] if len(names) == 1 else (
            "all" if names == ctx.run.species_names() else " + ".join(names))
        self.notes: list[str] = []
        self.positions = []
        self.frames = []
        for i in positions:
            frame = self._frame(i)
            if frame is None:
                self.notes.append(f"snapshot {i} has no particles of {self.label}: left out of the movie")
                continue
            self.positions.append(i)
            self.frames.append(frame)
        if not self.frames:
            raise InputError(ctx.run.source, f"has no particles of {self.label} in the snapshots asked for")
        first = self.frames[0]
        pair = opts.space if which == "space" else opts.phase
        lacking = policy.has_view(first, which)
        if pair is None and lacking is None:
            space, phase = policy.default_axes(first, first.columns)
            pair = space if which == "space" else phase
        if pair is None:
            raise InputError(first.source or ctx.run.source,
                             f"species {self.label} has no {which} view: it has no {lacking}",
                             f"columns are: {', '.join(first.columns)}; name them with --{which} A,B")
        for c in pair:
            if c not in first:
                raise InputError(first.source or ctx.run.source,
                                 f"species '{self.label}' has no column '{c}' (asked for --{which})",
                                 f"columns are: {', '.join(first.columns)}")
        self.xcol, self.ycol = pair
        self.equal = policy.equal_aspect(self.frames, self.xcol, self.ycol)
        self.run_name = policy.run_name(ctx)
        self.view = None                # the policy's view, made once the frames' ranges are known
        self.aggregates: list = []
        self.norm = None
        self.scale = (0.0, 1.0)

    def _frame(self, i):
        from ..core.frame import concat_frames
        snap = self.ctx.run[i]
        parts = [snap.species[s] for s in self.species_names if s in snap.species]
        if not parts:
            return None
        if len(self.species_names) == 1:
            return parts[0]
        return concat_frames(parts, species=self.label, source=snap.path)

    def title(self, k: int) -> str:
        from . import view_policy as policy
        i = self.positions[k]
        return policy.view_title(self.which, self.label,
                                 policy.snapshot_label_of(self.ctx.run[i], i))

    # one pass over the run -------------------------------------------------------------------
    def aggregate(self, bar=None) -> None:
        """Bin every frame on the shared ranges and grid, then make the one colour scale."""
        from ..core.frame import transient_columns
        from . import render
        from . import view_policy as policy
        cols = (self.xcol, self.ycol)
        layout = self.ctx.layout(self.positions[0])
        # each frame's data range is cached on it, so the union below reads nothing again
        for f in self.frames:
            with transient_columns([f]):
                for c in cols:
                    if c in f and f.length:
                        render.data_range(f, c)
        ranges = self.opts.ranges
        self.view = policy.make_view(self.which, self.frames[0], self.xcol, self.ycol,
                                     frames=self.frames, layout=layout,
                                     x_range=ranges.get(self.xcol), y_range=ranges.get(self.ycol),
                                     cmap=self.opts.cmap, scaling=self.opts.scale,
                                     box=policy.figure_box(self.opts.width, self.opts.height))
        self.ranges = {self.xcol: self.view.x_range, self.ycol: self.view.y_range}
        self.grid = self.view.grid
        self.notes.extend(n for n in self.view.notes if n not in self.notes)
        self.aggregates = []
        for k, f in enumerate(self.frames):
            with transient_columns([f]):
                agg = self.view.aggregate(f)
            self.aggregates.append(agg)
            if bar is not None:
                bar.step(f"binned snapshot {self.positions[k]}")
        self.norm, self.scale = shared_norm([a.values for a in self.aggregates], self.opts.scale)

    def frame_view(self, k: int):
        """The view of frame ``k``: the shared view with that snapshot's title and labels."""
        from dataclasses import replace
        from . import render
        f = self.frames[k]
        return replace(self.view, title=self.title(k), xlabel=render.axis_label(f, self.xcol),
                       ylabel=render.axis_label(f, self.ycol))

    def _size(self):
        from .mpl_figures import FigureSize
        return FigureSize.of(self.opts)

    def still(self, k: int) -> np.ndarray:
        """Frame ``k`` drawn as a figure of its own (the export's path), on the shared scale."""
        from .mpl_figures import density_figure, show_density
        view = self.frame_view(k)
        return show_density(density_figure(view, self._size()), view, self.aggregates[k],
                            norm=self.norm).pixels()

    def pixels(self, bar=None):
        """Every frame as an (height, width, 3) uint8 array, in run order: one laid-out
        figure, each frame's image and title swapped into it."""
        from .mpl_figures import density_figure, show_density
        figure = None
        for k in range(len(self.frames)):
            view = self.frame_view(k)
            if figure is None:
                figure = density_figure(view, self._size())
            yield show_density(figure, view, self.aggregates[k], norm=self.norm).pixels()
            if bar is not None:
                bar.step(f"frame {k + 1}/{len(self.frames)}")


def shared_norm(arrays, scaling: str):
    """One matplotlib colour scale for every frame: (norm, (low, high)).

    The ends are the smallest and largest non-empty bin over all frames
    (empty bins stay transparent, as in a single figure). For ``eq_hist`` the
    equalisation is computed once from the bins of every frame pooled
    (``colours.eq_hist_edges``, holoviews' binning) and then kept fixed.
    """
    from .colours import scale_norm, shown_values
    return scale_norm([shown_values(a, "count", scaling) for a in arrays], scaling)


# encoding ------------------------------------------------------------------------------------
def _even(frame: np.ndarray) -> np.ndarray:
    """H.264 in yuv420p needs even sides: repeat the last row/column where one is odd."""
    h, w = frame.shape[:2]
    if h % 2 or w % 2:
        frame = np.pad(frame, ((0, h % 2), (0, w % 2), (0, 0)), mode="edge")
    return frame


def encode(frames, path: str, fmt: str, fps: float) -> None:
    """Write RGB frames (an iterable of uint8 arrays) as ``fmt`` to ``path``, atomically."""
    root, ext = os.path.splitext(path)
    tmp = f"{root}.part{ext}"
    try:
        if fmt == "mp4":
            import imageio.v2 as imageio
            writer = imageio.get_writer(tmp, format="FFMPEG", mode="I", fps=fps, codec="libx264",
                                        pixelformat="yuv420p", quality=MP4_QUALITY,
                                        macro_block_size=1, ffmpeg_log_level="error")
            try:
                for f in frames:
                    writer.append_data(_even(f))
            finally:
                writer.close()
        else:
            from PIL import Image
            pics = []
            for f in frames:
                pic = Image.fromarray(f, mode="RGB")
                if fmt == "gif":
                    # an adaptive palette per frame, no dither: flat colours stay flat
                    pic = pic.quantize(colors=256, method=Image.Quantize.MEDIANCUT,
                                       dither=Image.Dither.NONE)
                pics.append(pic)
            ms = max(int(round(1000.0 / fps)), 10)
            extra = dict(quality=WEBP_QUALITY, method=4) if fmt == "webp" else dict(optimize=False)
            pics[0].save(tmp, format=fmt.upper(), save_all=True, append_images=pics[1:], duration=ms,
                         loop=0, **extra)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.remove(tmp)
        raise


# the command ---------------------------------------------------------------------------------
def write_movie(ctx, out: str, *, view: str = "space", species: str | None = None,
                fps: float = DEFAULT_FPS, snapshots: str = "all", opts=None, stream=None,
                keep: bool = False, args=None, bar=None):
    """Render and write one movie; returns a MovieResult (``keep``: with the MovieFrames as ``.frames_of``).

    ``bar`` is a progress bar to step (the export's); without one the movie draws its own.
    """
    from .export import ExportOptions, guard_outputs, input_files, select_snapshots
    from .progress import Progress
    t0 = time.perf_counter()
    out = os.path.abspath(os.fspath(out))
    fmt = movie_format(out)
    fps = check_fps(fps)
    opts = opts or ExportOptions(out=os.path.dirname(out))
    if os.path.isdir(out):
        raise OptionError(f"--out {out} is a folder; name the movie file (e.g. {view}.mp4)")
    positions = select_snapshots(snapshots or "all", len(ctx.run))
    ctx.layout(positions[0])   # finds a layout file beside the run, which is an input too
    guard_outputs([out], input_files(ctx, args))
    movie = MovieFrames(ctx, view, positions, opts, species)
    n = len(movie.frames)
    quiet = bool(getattr(opts, "quiet", False))
    own = bar is None
    if own:
        bar = Progress(2 * n + 1, "movie", stream=stream, enabled=False if quiet else None)
    else:
        bar.add(2 * n + 1)
    with (bar if own else _nothing()):
        movie.aggregate(bar)
        os.makedirs(os.path.dirname(out) or ".", exist_ok=True)
        encode(movie.pixels(bar), out, fmt, fps)
        bar.step(f"movie {os.path.basename(out)}")
    w, h = opts.width, opts.height
    if fmt == "mp4":
        w, h = w + w % 2, h + h % 2
    res = MovieResult(out, view, movie.label, (movie.xcol, movie.ycol), list(movie.positions),
                      opts.scale, movie.scale, (w, h), fps, time.perf_counter() - t0,
                      list(movie.notes))
    if keep:
        res.frames_of = movie
    return res


def _nothing():
    from contextlib import nullcontext
    return nullcontext()


def add_movie_options(p) -> None:
    """The movie command's own options (the figure options are the export's, same defaults)."""
    from .export import ExportOptions
    d = ExportOptions.__dataclass_fields__
    p.add_argument("--view", required=True, choices=("space", "phase"),
                   help="which particle view to animate")
    p.add_argument("--out", required=True, metavar="FILE", help="the movie: FILE.mp4, FILE.gif or FILE.webp")
    p.add_argument("--fps", default=DEFAULT_FPS, metavar="N",
                   help=f"frames (snapshots) per second (default {DEFAULT_FPS:g})")
    p.add_argument("--snapshots", default="all", metavar="WHICH",
                   help="snapshots to show: all (default), first,last, or positions like 0,5,-1")
    p.add_argument("--width", type=int, default=d["width"].default,
                   help=f"frame width in pixels (default {d['width'].default})")
    p.add_argument("--height", type=int, default=d["height"].default,
                   help=f"frame height in pixels (default {d['height'].default})")
    p.add_argument("--dpi", type=int, default=d["dpi"].default,
                   help=f"dots per inch of the lettering (default {d['dpi'].default})")
    p.add_argument("--cmap", default=d["cmap"].default,
                   help=f"colour map name (default {d['cmap'].default})")
    p.add_argument("--scale", choices=("linear", "log", "eq_hist"), default=d["scale"].default,
                   help=f"colour scaling, one scale over all frames (default {d['scale'].default})")
    p.add_argument("--space", metavar="A,B", help="columns of the spatial view (default: first two position axes)")
    p.add_argument("--phase", metavar="A,B", help="columns of the phase-space view (default: x against its momentum)")
    p.add_argument("--range", action="append", default=[], metavar="COL=LO,HI",
                   help="axis range of a column (repeatable)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def movie_options(args):
    """The export's figure options from a movie command line (same checks, same messages)."""
    from types import SimpleNamespace
    from .export import ExportOptions
    values = dict(vars(args))
    values.update(out=os.path.dirname(os.path.abspath(args.out)), rtol=None)
    return ExportOptions.from_args(SimpleNamespace(**values))


def run_movie(ctx, args) -> int:
    """The CLI entry: write the movie, say what was written."""
    import sys
    opts = movie_options(args)
    res = write_movie(ctx, args.out, view=args.view, fps=args.fps, snapshots=args.snapshots,
                      opts=opts, args=args)
    print(f"swarmaudit movie: wrote {res.frames} frame{'s' if res.frames != 1 else ''} of the "
          f"{res.view} view ({res.columns[0]}, {res.columns[1]}) of {res.species} to {res.path} in "
          f"{res.seconds:.1f} s; one {res.scaling} colour scale, {_num(res.scale[0])} … "
          f"{_num(res.scale[1])} particles per bin")
    for note in list(res.notes) + list(ctx.notes):
        print(f"note: {note}", file=sys.stderr)
    return 0


def _num(v: float) -> str:
    return f"{int(v):,}" if float(v).is_integer() and math.isfinite(v) else f"{v:.4g}"
