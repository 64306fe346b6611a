"""The progress line of each pass (pcapipe.progress): labelled, one bar per pass, no stale characters."""

from __future__ import annotations

import io
import re

import numpy as np

import pcapipe
from conftest import known_spectrum, make_config, write_parquet
from pcapipe.progress import PassProgressBar, progress_line

_LINE = re.compile(r"^(\w+) +\[#* *\] +\d+% \| +\d+\.\d s$")


class _Terminal(io.StringIO):
    """A stderr that says it is a terminal, so that progress is drawn."""

    def isatty(self) -> bool:
        return True


def _screen(text: str) -> list[str]:
    """What a terminal shows: each carriage return moves to column 0 and later text overwrites."""
    lines = []
    for raw in text.split("\n"):
        shown: list[str] = []
        for part in raw.split("\r"):
            shown[: len(part)] = list(part)
        lines.append("".join(shown).rstrip())
    return [line for line in lines if line]


def test_a_shorter_redraw_leaves_nothing_of_the_longer_one():
    out = io.StringIO()
    bar = PassProgressBar("product", out=out)
    bar._draw_bar(0.5, 125.0)   # "2 min 05 s": longer
    bar._draw_bar(1.0, 0.004)   # "0.0 s": shorter
    assert _screen(out.getvalue()) == [progress_line("product", 1.0, 0.004)]


def test_every_pass_has_its_own_labelled_bar_including_the_read_into_memory(tmp_path, monkeypatch):
    x = known_spectrum(3000, 8, [5, 3, 2, 1, 0.5, 0.4, 0.3, 0.2], np.random.default_rng(1))
    write_parquet(tmp_path / "in", x, files=2, row_group=500)
    cfg = make_config(str(tmp_path / "in" / "*.parquet"), tmp_path / "run",
                      model={"components": 2, "method": "matrix-free"}, compute={"progress": True})
    term = _Terminal()
    monkeypatch.setattr("sys.stderr", term)
    res = pcapipe.run(cfg)
    screen = _screen(term.getvalue())
    bars = [line for line in screen if "[" in line and "%" in line]
    assert all(_LINE.match(line) for line in bars), bars  # nothing left over after the time
    labels = [line.split()[0] for line in bars]
    m = res.manifest
    assert m["blocks_cached"].startswith("rows read once")
    # one bar per pass: the read into memory (with the moments), one per operator application, scores
    assert labels == (["read"] + ["product"] * m["solver"]["operator_applications"] + ["scores"])
    assert len(labels) == m["passes_over_data"]
    assert all(line.split("]")[1].strip().startswith("100%") for line in bars)
