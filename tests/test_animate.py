"""Animated map loops (workbench.animate) and the `pvwb animate` command."""
from __future__ import annotations

import numpy as np
import pytest
from PIL import Image, ImageSequence

from workbench.animate import animate_map, ffmpeg_available
from workbench.cli import main as pvwb
from workbench.errors import ExportError
from workbench.inversion.pieces import Piece


def _frames(path):
    with Image.open(path) as im:
        return [np.asarray(f.convert("RGB")) for f in ImageSequence.Iterator(im)]


def test_gif_has_one_frame_per_time_and_frames_differ(small_case, tmp_path):
    out = animate_map(small_case, tmp_path / "loop.gif", "ertel_pv", "500hPa", fps=4, dpi=40)
    frames = _frames(out)
    assert len(frames) == small_case.times.size == 2
    assert frames[0].shape == frames[1].shape
    # the wave moves between the two times, so the map pixels change
    assert np.mean(np.any(frames[0] != frames[1], axis=-1)) > 0.01
    with Image.open(out) as im:
        assert im.info["duration"] == 250  # ms per frame at 4 frames per second
    with pytest.raises(ExportError, match="already exists"):
        animate_map(small_case, out, "ertel_pv", "500hPa")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["loop.gif"]  # no temporary left behind


def test_tracked_outline_and_overlay_drawn(small_case, tmp_path):
    piece = Piece("upper", layer=(500.0, 200.0), threshold=0.3, polygon=[(-20, 38), (20, 38), (20, 52), (-20, 52)],
                  follow="anomaly")
    from workbench.animate import frame_maps

    times, maps, settings = frame_maps(small_case, "ertel_pv", "500hPa", pieces=[piece], reference="area_mean")
    assert times == [0, 1]
    assert all(m.overlays and m.overlays[0].name == "upper" for m in maps)
    assert all(any(getattr(a, "label", None) == "upper" for a in m.annotations) for m in maps)
    assert settings.levels and len(settings.levels) > 2  # the same shading levels in every frame


def test_bad_requests(small_case, tmp_path):
    with pytest.raises(ExportError, match=r"\.gif or \.mp4"):
        animate_map(small_case, tmp_path / "loop.avi")
    if not ffmpeg_available():
        with pytest.raises(ExportError, match="ffmpeg"):
            animate_map(small_case, tmp_path / "loop.mp4")
    assert pvwb(["animate", "-o", str(tmp_path / "x.gif"), "--fps", "0"]) == 2
    assert pvwb(["animate", "-o", str(tmp_path / "x.txt")]) == 2
    assert not list(tmp_path.iterdir())


def test_command_line(small_case_path, tmp_path, capsys):
    out = tmp_path / "loop.gif"
    assert pvwb(["--quiet", "animate", str(small_case_path), "-o", str(out), "--surface", "500hPa", "--dpi", "40",
                 "--fps", "1"]) == 0
    assert len(_frames(out)) == 2
    assert "wrote" in capsys.readouterr().out
