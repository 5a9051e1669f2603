"""Populations in the batch: populations.csv and one FCS per rare population.

References: the csv module (the table as a spreadsheet reads it), fcsparser
(the exported rare population read back), numpy (counts of the labels).
"""

import csv
import os

import numpy as np

from core.analysis import analyse
from core.batch import POPULATION_COLUMNS, POPULATIONS_NAME, file_out_dir, run_batch
from core.fcs import read_fcs
from tests.test_analysis import make_file, recipe


def test_batch_writes_populations_csv_and_rare_population_files(tmp_path):
    import fcsparser

    inp = tmp_path / "in"
    inp.mkdir()
    make_file(inp / "one.fcs", n=4000, seed=1, spike=30)      # 30 events (0.75 %) far from the rest
    rec = recipe(regions=[], engine={"n_trees": 30, "random_state": 0})
    res = run_batch(str(inp), str(tmp_path / "out"), recipe=rec, workers=1)
    assert [r["status"] for r in res.rows] == ["ok"], res.rows
    an = analyse(read_fcs(str(inp / "one.fcs")), rec)        # the same analysis, file by file
    with open(tmp_path / "out" / POPULATIONS_NAME, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert list(rows[0]) == POPULATION_COLUMNS
    assert len(rows) == len(an.populations.table)
    for row, r in zip(rows, an.populations.table):
        assert row["file"] == "one.fcs" and int(row["population"]) == r["id"] + 1   # numbers from 1
        assert int(row["count"]) == int(np.count_nonzero(an.population_labels == r["id"]))
    rare = [r for r in an.populations.table if r["rare"]]
    assert rare, "the spiked group should be a rare population"
    folder = file_out_dir(str(tmp_path / "out"), str(inp / "one.fcs"))
    for r in rare:
        path = os.path.join(folder, f"one_rare_population_{r['id'] + 1}.fcs")
        meta, df = fcsparser.parse(path, reformat_meta=True, channel_naming="$PnN")
        assert len(df) == r["count"]
        assert set(df["population"].to_numpy()) == {float(r["id"] + 1)}
    spiked = np.zeros(an.n_events, bool)
    spiked[:30] = True
    best = max(rare, key=lambda r: np.count_nonzero(spiked & (an.population_labels == r["id"])))
    found = an.population_labels == best["id"]
    assert np.count_nonzero(found & spiked) >= 27 and np.count_nonzero(found & ~spiked) <= 3
