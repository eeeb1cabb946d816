"""The progress line: phases, an honest share of the work, a time left only when meaningful.

Unit checks drive :class:`toolbox.progress.ProgressLine` with a fake clock; the end-to-end check
runs the command line on a pseudo-terminal (the line is drawn only on a terminal) and reads
what a user would see.
"""

from __future__ import annotations

import io
import os
import re
import subprocess
import sys

import numpy as np
import pyogrio
import pytest
import shapely

from toolbox.progress import ProgressLine


def _line(now):
    return ProgressLine("group-spread", True, stream=io.StringIO(), clock=lambda: now[0], redraw=False)


def test_one_report_at_the_end_never_shows_a_guess():
    # a 13 s exact run that reports only when it is done: 0 % with the time so far, no time left,
    # no rate, then 100 %
    now = [0.0]
    line = _line(now)
    line.phase("reading")
    now[0] = 2.0
    assert line.text() == "group-spread: reading, 0:02"
    line(0, 50_000)
    now[0] = 15.0
    assert line.text() == "group-spread: computing   0% |          | 0:13"
    line(50_000, 50_000)
    assert line.text() == "group-spread: computing 100% |██████████| 0:13"


def test_time_left_only_after_enough_of_the_work():
    now = [0.0]
    line = _line(now)
    line(0, 1000)
    for t, done in [(1.0, 10), (2.0, 30), (3.0, 45)]:  # under 5 %: no time left yet
        now[0] = t
        line(done, 1000)
        assert "left" not in line.text()
    now[0] = 4.0
    line(200, 1000)  # 20 % in 4 s: about 16 s more
    assert line.text().endswith("20% |██        | 0:04, about 0:16 left")


def test_a_jump_straight_to_the_end_shows_no_time_left():
    now = [0.0]
    line = _line(now)
    line(0, 2_000_000)
    now[0] = 4.0
    line(2_000_000, 2_000_000)
    assert "left" not in line.text() and "/s" not in line.text()


def test_disabled_line_draws_nothing():
    stream = io.StringIO()
    line = ProgressLine("x", False, stream=stream)
    line.phase("reading")
    line(5, 10)
    line.phase("writing")
    line.close()
    assert stream.getvalue() == ""


@pytest.mark.skipif(not hasattr(os, "openpty"), reason="needs a pseudo-terminal")
def test_command_line_on_a_terminal_shows_every_phase(tmp_path):
    rng = np.random.default_rng(4)
    n = 20_000
    frame = {"zone": rng.choice(["a", "b", "c"], n)}
    import geopandas as gpd

    layer = gpd.GeoDataFrame(frame, geometry=shapely.points(rng.uniform(0, 5e3, n), rng.uniform(0, 5e3, n)),
                             crs="EPSG:32705")
    data = tmp_path / "pts.gpkg"
    pyogrio.write_dataframe(layer, data)
    master, slave = os.openpty()
    proc = subprocess.Popen(
        [sys.executable, "-m", "toolbox", "group-spread", str(data), "--group-by", "zone",
         "--output", str(tmp_path / "out.gpkg")],
        stdin=subprocess.DEVNULL, stdout=slave, stderr=slave, close_fds=True,
    )  # fmt: skip
    os.close(slave)
    chunks = []
    while True:
        try:
            chunk = os.read(master, 4096)
        except OSError:  # the terminal is closed once the process ends
            break
        if not chunk:
            break
        chunks.append(chunk)
    os.close(master)
    assert proc.wait(timeout=300) == 0
    seen = b"".join(chunks).decode("utf-8", "replace")
    drawn = [s for s in re.split(r"[\r\n]", seen) if s.strip()]
    phases = [p for s in drawn for p in ("reading", "computing", "writing") if f"group-spread: {p}" in s]
    order = [p for i, p in enumerate(phases) if i == 0 or phases[i - 1] != p]
    assert order == ["reading", "computing", "writing"], drawn
    assert not re.search(r"/s\b|pt\b", seen), seen  # no rate, no unit a user cannot read
    assert "wrote 3 row(s)" in seen
