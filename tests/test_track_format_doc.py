"""docs/track-format.md describes what `replay.run` writes: the same columns, units and
decision codes (checked against the file a replay of a demo log writes)."""
from __future__ import annotations

import json
import os
import re

import h5py

from fusion import decisions as D
from replay.run import run

DOC = os.path.join(os.path.dirname(__file__), "..", "docs", "track-format.md")
DATA = os.path.join(os.path.dirname(__file__), "..", "datasets")


def _doc_tables():
    text = open(DOC, encoding="utf-8").read()
    sections = {}
    for name in ("decisions/", "track/<direction>/"):
        body = text.split(f"## `{name}`", 1)[1].split("\n## ", 1)[0]
        cols = {}
        for line in body.splitlines():
            cells = [c.strip() for c in line.strip().strip("|").split("|")]
            if len(cells) == 4 and cells[0].startswith("`"):
                for col in re.findall(r"`([a-z_0-9]+)`", cells[0]):
                    cols[col] = (cells[1], cells[2])
        sections[name] = cols
    codes = {}
    body = text.split("## Decision codes", 1)[1]
    for line in body.splitlines():
        m = re.match(r"\| (\d+) \| `([a-z_]+)` \|", line)
        if m:
            codes[int(m.group(1))] = m.group(2)
    return sections, codes


def test_doc_matches_a_written_track_file(tmp_path):
    out = tmp_path / "dock.track.h5"
    run(os.path.join(DATA, "cold-store-dock.h5"), out=out)
    sections, codes = _doc_tables()
    with h5py.File(out, "r") as f:
        for group, cols in (("decisions", sections["decisions/"]),
                            ("track/front", sections["track/<direction>/"])):
            g = f[group]
            assert set(g) == set(cols), group
            for name, (dtype, units) in cols.items():
                assert str(g[name].dtype) == dtype.split(",")[0], (group, name)
                assert g[name].attrs.get("units", "") in units.split(", ") or \
                    (units == "" and "units" not in g[name].attrs), (group, name)
                assert g[name].fletcher32, (group, name)
        assert json.loads(f.attrs["decision_names"]) == list(D.NAMES)
    assert [codes[i] for i in range(len(codes))] == list(D.NAMES)
