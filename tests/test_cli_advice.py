"""advice.json from `filmmap reduce` and the `filmmap predict` command, on the invented demo lot.

A consistency test: the demo lot's oxide is grown by filmmap's own growth model from the
profile `demo_temperature_offset_C`, and the advice reads it back with that model. The
outside checks of the advice are test_boat_model.py and test_advice_unlike_its_model.py
(furnaces from the independent Deal-Grove of tests/furnace_reference.py).
"""

import json

import pytest

from filmmap.pipeline.demo import demo_temperature_offset_C, generate_demo_lot

from test_reduce import run_cli

PINNED = ["adjust_step", "minutes_now", "minutes_next", "zone_offsets_C",
          "effective_offset_C_by_slot", "predicted_wtw_pct_now", "predicted_wtw_pct_next",
          "warnings"]


@pytest.fixture(scope="module")
def demo_results(tmp_path_factory):
    root = tmp_path_factory.mktemp("demo")
    lot = generate_demo_lot(root / "lot")
    r = run_cli("reduce", lot, "-o", root / "out", "--no-figures")
    assert r.returncode == 0, r.stderr
    return lot, root / "out", r.stdout


def test_reduce_writes_pinned_advice(demo_results):
    lot, out, stdout = demo_results
    advice = json.loads((out / "advice.json").read_text())
    assert list(advice)[:len(PINNED)] == PINNED
    assert advice["adjust_step"] == "wet" and advice["minutes_now"] == 115.0
    assert set(advice["zone_offsets_C"]) == {"load", "center", "source"}
    assert all(abs(v) <= 5.0 for v in advice["zone_offsets_C"].values())   # max_offset_C
    assert abs(advice["minutes_next"] / advice["minutes_now"] - 1) <= 0.15   # max_time_change_pct
    # the invented tube is cold at the load end: the oxide thermometer reads it (demo.py's profile)
    eff = {int(k): v for k, v in advice["effective_offset_C_by_slot"].items() if v is not None}
    assert eff[4] < eff[25] - 2.0
    true_diff = demo_temperature_offset_C(4) - demo_temperature_offset_C(25)
    # each demo wafer mean carries its map's bowl and tilt and 0.05 % site noise: a few
    # 0.1 nm, a few 0.01 K at ~5 nm/K (measured 0.07 K)
    assert abs((eff[4] - eff[25]) - true_diff) < 0.2
    assert advice["zone_offsets_C"]["load"] > advice["zone_offsets_C"]["source"]
    assert advice["predicted_wtw_pct_next"] < advice["predicted_wtw_pct_now"]
    # the console says the advice is advisory (in the decision block's caution line) and
    # states the next run once
    assert "advisory only" in stdout.lower()
    assert stdout.count("Next run: Set wet to") == 1


def test_predict_prints_zones_and_caution(demo_results):
    lot, out, _ = demo_results
    r = run_cli("predict", lot, "--set", "wet.minutes=130", "--trim", "load=+2",
                "--advice", out / "advice.json")
    assert r.returncode == 0, r.stderr
    assert "(changed)" in r.stdout and "load" in r.stdout and "never drives equipment" in r.stdout
    bad = run_cli("predict", lot, "--set", "nosuchstep.minutes=10")
    assert bad.returncode == 2 and "nosuchstep" in bad.stderr


def test_every_output_names_the_same_edge_slots(demo_results):
    # the lot's edge slots come from the advice's boat model; the per-wafer flags in
    # summary.json, summary.csv and the report's WIW table must say the same (they once kept
    # the statistical rule's slots 4-6 while the verdict said 4)
    import csv

    _, out, stdout = demo_results
    summary = json.loads((out / "summary.json").read_text())
    edge = summary["lot"]["edge_slots"]
    assert edge, "the demo tube is cold at the load end: it has an edge slot"
    assert sorted(w["slot"] for w in summary["wafers"] if w["flag"] == "edge") == edge
    with open(out / "summary.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert sorted(int(r["slot"]) for r in rows if r["flag"] == "edge") == edge
    html = (out / "report.html").read_text()
    assert html.count('<tr class="edge">') == len(edge)
    words = ", ".join(map(str, edge))
    assert f"edge slots at the load end: {words}" in stdout
