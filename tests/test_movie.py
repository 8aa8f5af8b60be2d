"""``swarmaudit movie``: every snapshot drawn like the export, one colour scale, decodable files."""

from __future__ import annotations

import hashlib
import os

import numpy as np
import pytest

from _export_samples import LAYOUT_ARGS, write_npz_run
from swarmaudit.app.cli import build_parser, main
from swarmaudit.app.export import ExportOptions, export_run
from swarmaudit.app.movie import MovieFrames, shared_norm, write_movie
from swarmaudit.app.options import context_from_options

W, H, DPI = 360, 280, 60
SIZE = ["--width", str(W), "--height", str(H), "--dpi", str(DPI)]
SNAPS = 4


@pytest.fixture(scope="module")
def sample(tmp_path_factory):
    base = tmp_path_factory.mktemp("movie")
    run, _ = write_npz_run(str(base / "run"), n=2000, snapshots=SNAPS, steps_between=10, dt=0.02)
    return {"run": run, "base": base}


def _ctx(sample, *extra):
    args = build_parser().parse_args(["movie", sample["run"], *LAYOUT_ARGS, "--species", "ions",
                                      "--no-cache", "--view", "phase", "--out", "x.mp4", *extra])
    return context_from_options(args), args


def _opts(out, scale="eq_hist"):
    return ExportOptions(out=str(out), width=W, height=H, dpi=DPI, scale=scale, quiet=True)


def _differ(a: np.ndarray, b: np.ndarray) -> float:
    assert a.shape == b.shape
    return float(np.mean(np.abs(a.astype(np.int16) - b.astype(np.int16))))


def _not_blank(frame: np.ndarray) -> None:
    # a figure: white paper, dark lettering and coloured bins; not one flat colour
    assert frame.std() > 20
    colourful = (frame.max(axis=2).astype(int) - frame.min(axis=2)) > 60
    assert colourful.mean() > 0.01


def _decode_mp4(path):
    import imageio.v2 as imageio
    with imageio.get_reader(path, format="FFMPEG") as reader:
        return [np.asarray(f) for f in reader]


def _decode_pillow(path):
    from PIL import Image, ImageSequence
    with Image.open(path) as im:
        return [np.asarray(f.convert("RGB")) for f in ImageSequence.Iterator(im)]


def test_mp4_frames_are_the_figures_on_one_scale(sample, tmp_path):
    ctx, _ = _ctx(sample)
    out = tmp_path / "phase.mp4"
    res = write_movie(ctx, out, view="phase", fps=4, opts=_opts(tmp_path), keep=True)
    movie = res.frames_of
    frames = _decode_mp4(str(out))
    assert len(frames) == SNAPS == res.frames
    assert frames[0].shape == (H, W, 3)
    stills = [movie.still(k) for k in range(SNAPS)]
    for k, frame in enumerate(frames):
        _not_blank(frame)
        # the frame drawn into the laid-out figure equals a figure built afresh for it, within
        # H.264's error (about 2.6 of 255 on average here, chroma halved around the lettering;
        # a neighbouring snapshot's figure is about 28 away)
        errors = [_differ(frame, s) for s in stills]
        assert errors[k] < 5.0 and int(np.argmin(errors)) == k, (k, errors)
    # one colour scale: its ends are the smallest and largest non-empty bin of all frames (numpy)
    pooled = np.concatenate([np.asarray(a.values, float).ravel() for a in movie.aggregates])
    pooled = pooled[pooled > 0]
    assert res.scale == (pooled.min(), pooled.max())
    # and the equalisation is holoviews' EqHistNormalize binning of the pooled bins, frozen:
    # every frame is coloured by that one mapping, not re-equalised on its own
    from holoviews.plotting.mpl.util import EqHistNormalize
    ref = EqHistNormalize(vmin=pooled.min(), vmax=pooled.max())
    edges = ref.binning(pooled, 256)
    for a in movie.aggregates:
        v = np.asarray(a.values, float).ravel()
        v = v[v > 0]
        want = np.interp(v, edges, np.linspace(0, 1, 257))
        assert np.allclose(np.asarray(movie.norm(v)), want)


def test_movie_bins_are_the_exports_bins(sample, tmp_path):
    ctx, args = _ctx(sample)
    res = export_run(ctx, ExportOptions(out=str(tmp_path / "export"), snapshots="all", width=W,
                                        height=H, dpi=DPI, quiet=True), args, keep_aggregates=True)
    movie = MovieFrames(ctx, "phase", list(range(SNAPS)), _opts(tmp_path))
    movie.aggregate()
    exported = {f.snapshot: f for f in res.figures if f.kind == "phase"}
    assert sorted(exported) == list(range(SNAPS))
    for k, i in enumerate(movie.positions):
        assert np.array_equal(np.asarray(movie.aggregates[k].values), np.asarray(exported[i].aggregate.values))
        assert movie.title(k) == exported[i].title


def test_one_frame_movie_is_the_exported_png(sample, tmp_path):
    """With one snapshot and a linear scale the shared scale is that figure's own: the frame is the PNG."""
    from PIL import Image
    ctx, args = _ctx(sample)
    res = export_run(ctx, ExportOptions(out=str(tmp_path / "export"), snapshots="2", width=W, height=H,
                                        dpi=DPI, scale="linear", quiet=True), args)
    png = next(f.path for f in res.figures if f.kind == "phase")
    want = np.asarray(Image.open(png).convert("RGB"))
    gif = tmp_path / "one.gif"
    write_movie(ctx, gif, view="phase", snapshots="2", opts=_opts(tmp_path, "linear"))
    mp4 = tmp_path / "one.mp4"
    write_movie(ctx, mp4, view="phase", snapshots="2", opts=_opts(tmp_path, "linear"))
    (g,) = _decode_pillow(str(gif))
    (m,) = _decode_mp4(str(mp4))
    assert _differ(g, want) < 3.0      # palette quantisation
    assert _differ(m, want) < 5.0      # H.264 at high quality, chroma halved


def test_gif_and_webp(sample, tmp_path):
    ctx, _ = _ctx(sample)
    for name in ("space.gif", "space.webp"):
        out = tmp_path / name
        res = write_movie(ctx, out, view="space", snapshots="0,1,-1", fps=2, opts=_opts(tmp_path),
                          keep=True)
        frames = _decode_pillow(str(out))
        assert len(frames) == 3, name
        for k, frame in enumerate(frames):
            _not_blank(frame)
            assert _differ(frame, res.frames_of.still(k)) < 4.0, (name, k)


def test_command_line(sample, tmp_path, capsys):
    out = tmp_path / "cli.mp4"
    code = main(["movie", sample["run"], *LAYOUT_ARGS, "--view", "space", "--species", "electrons",
                 "--snapshots", "first,last", "--fps", "3", "--out", str(out), *SIZE, "--quiet"])
    text = capsys.readouterr().out
    assert code == 0, text
    assert "wrote 2 frames of the space view (x, y) of electrons" in text
    assert len(_decode_mp4(str(out))) == 2


@pytest.mark.parametrize("extra, message", [
    (["--out", "movie.avi"], "a movie file ends in .mp4, .gif or .webp"),
    (["--out", "m.mp4", "--fps", "0"], "--fps takes a number of frames per second"),
    (["--out", "m.mp4", "--snapshots", "9"], "position 9 is outside this run"),
    (["--out", "m.mp4", "--phase", "x,nope"], "has no column 'nope'"),
    (["--out", "m.mp4", "--cmap", "nocolours"], "no colour map named 'nocolours'"),
])
def test_bad_input_is_one_sentence(sample, tmp_path, capsys, extra, message):
    os.chdir(tmp_path)
    code = main(["movie", sample["run"], *LAYOUT_ARGS, "--view", "phase", *SIZE, "--quiet", *extra])
    err = capsys.readouterr().err
    assert code == 2 and message in err and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1


def test_never_overwrites_an_input(sample, capsys):
    victim = sorted(os.listdir(sample["run"]))[0]
    path = os.path.join(sample["run"], victim)
    before = hashlib.sha256(open(path, "rb").read()).hexdigest()
    target = path[:-4] + ".gif"
    os.symlink(path, target)
    try:
        code = main(["movie", sample["run"], *LAYOUT_ARGS, "--view", "space", "--out", target,
                     *SIZE, "--quiet"])
    finally:
        os.remove(target)
    assert code == 2 and "is one of the run's input files" in capsys.readouterr().err
    assert hashlib.sha256(open(path, "rb").read()).hexdigest() == before


def test_shared_norm_ends_and_empty_frames():
    a = np.array([[0, 2], [5, 0]], float)
    b = np.array([[9, 0], [1, 0]], float)
    norm, scale = shared_norm([a, b], "linear")
    assert scale == (1.0, 9.0) and norm(5.0) == pytest.approx(0.5)
    norm, scale = shared_norm([np.zeros((2, 2))], "log")
    assert scale == (0.0, 1.0)


def test_export_adds_movies_to_the_report(sample, tmp_path):
    import re
    out = tmp_path / "export"
    code = main(["export", sample["run"], *LAYOUT_ARGS, "--species", "ions", "--out", str(out),
                 *SIZE, "--quiet", "--movie", "gif"])
    assert code == 0
    movies = sorted(os.listdir(out / "movies"))
    assert movies == ["phase_ions.gif", "space_ions.gif"]
    for name in movies:
        assert len(_decode_pillow(str(out / "movies" / name))) == SNAPS
    page = (out / "report.html").read_text()
    assert "id='movies'" in page
    embedded = re.findall(r"<img src='data:image/gif;base64,[A-Za-z0-9+/=]+' alt='[^']*' "
                          r"data-file='([^']+)'", page)
    assert sorted(embedded) == movies
    # still one file: nothing the page loads lives outside it
    assert not re.search(r"(src|href)=['\"](https?:|//|file:)", page)
    mp4 = tmp_path / "export_mp4"
    code = main(["export", sample["run"], *LAYOUT_ARGS, "--species", "ions", "--out", str(mp4),
                 *SIZE, "--quiet", "--snapshots", "last", "--movie"])
    assert code == 0 and sorted(os.listdir(mp4 / "movies")) == ["phase_ions.mp4", "space_ions.mp4"]
    assert (mp4 / "report.html").read_text().count("<video controls") == 2
