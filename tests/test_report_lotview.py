"""Lot view, summary.json (pinned format) and the summary.csv rows.

Every check names its source beside it: a paper (author, year) or "common
practice, no source" for facts of the trade. The synthetic lots are built
here with the variable names of lot.nc, and their statistics are computed by
hand (plain numpy) so that the report is checked against an independent
computation.
"""

import functools
import json
import math
from types import SimpleNamespace

import numpy as np
import pytest
import xarray as xr

from filmmap.lotstats import DEFAULT_MIN_SITES, lot_view
from filmmap.report import (SUMMARY_CSV_COLUMNS, ReportImages, summary_csv_rows, summary_dict, write_summary_csv, write_summary_json)
from filmmap.report.summary_json import LOT_KEYS, WAFER_KEYS
from filmmap.wafermap.sites import polar_sites

D_MM, EE_MM = 150.0, 3.0
TARGET, TOL = 1000.0, 2.0


def hand_stats(t, use):
    """Within-wafer figures by hand: mean, sample sigma (n - 1), NU %, range, half-range %."""
    v = t[use]
    n = v.size
    mean = v.sum() / n if n else math.nan
    sigma = math.sqrt(((v - mean) ** 2).sum() / (n - 1)) if n >= 2 else math.nan
    rng = v.max() - v.min() if n else math.nan
    return {"mean_nm": mean, "sigma_nm": sigma, "nu_pct": 100 * sigma / mean,
            "min_nm": v.min() if n else math.nan, "max_nm": v.max() if n else math.nan,
            "range_nm": rng, "halfrange_pct": 100 * rng / (2 * mean), "sites_used": n}


def make_lot(seed=0, *, slots=range(4, 12), roles=None, true_nm=None, ids=None, n_sites=13,
             noise=0.005, failed=None):
    """A synthetic lot dataset with the variables of lot.nc (dims wafer, site).

    ``true_nm`` maps slot -> true thickness (default TARGET); ``failed`` maps
    wafer index -> number of sites whose fit failed.
    """
    rng = np.random.default_rng(seed)
    slots = np.array(list(slots))
    W = slots.size
    roles = np.array(roles if roles is not None else ["product"] * W)
    ids = np.array(ids if ids is not None else [f"W{s:02d}" for s in slots], dtype=object)
    sites = polar_sites(n_sites, D_MM, EE_MM)
    true = np.array([(true_nm or {}).get(int(s), TARGET) for s in slots])
    t = true[:, None] * (1 + noise * rng.standard_normal((W, n_sites)))
    ok = np.ones((W, n_sites), bool)
    note = np.full((W, n_sites), "", dtype=object)
    quality = rng.lognormal(0.0, 0.3, (W, n_sites))
    for i, k in (failed or {}).items():
        ok[i, n_sites - k:] = False
        note[i, n_sites - k:] = "poor fit: reduced chi-square above limit"
        quality[i, n_sites - k:] = 60.0
    t = np.where(ok, t, np.nan)
    stats = {k: np.array([hand_stats(t[i], ok[i])[k] for i in range(W)])
             for k in ("mean_nm", "sigma_nm", "nu_pct", "min_nm", "max_nm", "range_nm",
                       "halfrange_pct", "sites_used")}
    x = np.tile(sites.x_mm, (W, 1))
    y = np.tile(sites.y_mm, (W, 1))
    ds = xr.Dataset(
        {"thickness": (("wafer", "site"), t), "fit_ok": (("wafer", "site"), ok),
         "fit_quality": (("wafer", "site"), quality),
         "fit_note": (("wafer", "site"), note.astype(str)),
         **{k: ("wafer", v.astype(int) if k == "sites_used" else v) for k, v in stats.items()}},
        coords={"wafer": ("wafer", ids.astype(str)), "site": ("site", sites.site),
                "slot": ("wafer", slots), "role": ("wafer", roles.astype(str)),
                "x_mm": (("wafer", "site"), x), "y_mm": (("wafer", "site"), y)},
        attrs={"lot_id": "SYN-1", "software": "filmmap 0.1.0",
               "stack": "layer SiO2: Sellmeier; I. H. Malitson (1965)\nsubstrate Si: Green (2008)",
               "input_files_sha256": json.dumps(
                   [{"file": "lot.toml", "sha256": "ab" * 32}] +
                   [{"file": f"wafers/{w}.csv", "sha256": f"{i:064x}"} for i, w in enumerate(ids)]),
               "wafer_diameter_mm": D_MM, "edge_exclusion_mm": EE_MM})
    return ds


def make_config(*, target=True, boat=14, dummies=(1, 2, 3, 12, 13, 14), monitors=(),
                zones=(("load", 1, 7), ("source", 8, 14)), lot_id="SYN-1"):
    """A minimal lot configuration with the attributes the lot view reads."""
    return SimpleNamespace(
        lot=SimpleNamespace(id=lot_id, furnace="synthetic tube", run_date=None),
        target=SimpleNamespace(thickness_nm=TARGET, tolerance_pct=TOL) if target else None,
        boat=(SimpleNamespace(slots=boat, dummy_slots=tuple(dummies), monitor_slots=tuple(monitors))
              if boat else None),
        furnace=(SimpleNamespace(zones=tuple(SimpleNamespace(name=n, first_slot=a, last_slot=b)
                                             for n, a, b in zones)) if zones else None),
        measurement=SimpleNamespace(wafer_diameter_mm=D_MM, edge_exclusion_mm=EE_MM))


EVIL_WAFER = "EV<script>alert(\"x\")</script>&'q'"
EVIL_LOT = "LOT<b>&\"1\""


@functools.lru_cache(maxsize=1)
def shared_lot():
    """The 8-wafer lot of the HTML and PDF tests, its view and its images (made once).

    Slots 4-11 in a 14-slot boat (dummies 1-3, 12-14), a monitor in slot 8, slots 4
    and 5 3 % thin, a wafer id and a lot id full of markup, 2 failed sites on the
    evil wafer (one with a markup note) and 9 on W10 (4 usable sites: left out).
    """
    ids = ["W04", "W05", EVIL_WAFER, "W07", "W08", "W09", "W10", "W11"]
    ds = make_lot(5, ids=ids, roles=["product"] * 4 + ["monitor"] + ["product"] * 3,
                  true_nm={4: 970.0, 5: 970.0}, failed={2: 2, 6: 9})
    ds["fit_note"][2, -1] = "poor fit: <b>bad</b> & 'odd'"
    cfg = make_config(lot_id=EVIL_LOT, monitors=(8,))
    view = lot_view(ds, cfg)
    return ds, cfg, view, ReportImages(view, ds, None, dpi=40)


def strict_json(text):
    """Parse JSON refusing NaN / Infinity (RFC 8259 has no such numbers)."""
    def refuse(c):
        raise ValueError(f"non-standard JSON constant {c}")
    return json.loads(text, parse_constant=refuse)


# --------------------------------------------------------------------------- summary.json

# Lot with a monitor (slot 8) and a product wafer with only 3 usable sites (slot 10).
ROLES8 = ["product"] * 4 + ["monitor"] + ["product"] * 3


@pytest.fixture(scope="module")
def small_lot():
    # slot 6 is 2.5 % thin (out of a +/- 2 % spec), slot 9 is 1.2 % thick (in spec)
    ds = make_lot(3, roles=ROLES8, true_nm={6: 975.0, 9: 1012.0}, failed={6: 10, 1: 2})
    return ds, make_config(monitors=(8,))


def test_summary_json_pinned_keys_and_types(small_lot, tmp_path):
    # The pinned summary.json format (filmmap's own, see filmmap.report.summary_json).
    ds, cfg = small_lot
    path = write_summary_json(lot_view(ds, cfg), tmp_path)
    doc = strict_json(path.read_text(encoding="utf-8"))
    assert list(doc)[:2] == ["lot", "wafers"]
    lot = doc["lot"]
    assert tuple(lot)[:len(LOT_KEYS)] == LOT_KEYS == (
        "id", "mean_nm", "wtw_pct", "edge_slots", "flat_zone", "extra_dummies")
    assert isinstance(lot["id"], str) and lot["id"] == "SYN-1"
    assert isinstance(lot["mean_nm"], float) and isinstance(lot["wtw_pct"], float)
    assert isinstance(lot["edge_slots"], list) and all(type(s) is int for s in lot["edge_slots"])
    assert lot["flat_zone"] is None or (len(lot["flat_zone"]) == 2
                                        and all(type(s) is int for s in lot["flat_zone"]))
    assert set(lot["extra_dummies"]) == {"load", "source"}
    assert all(type(v) is int for v in lot["extra_dummies"].values())
    assert len(doc["wafers"]) == ds.sizes["wafer"]
    for row in doc["wafers"]:
        assert tuple(row)[:len(WAFER_KEYS)] == WAFER_KEYS == (
            "wafer", "slot", "role", "mean_nm", "sigma_nm", "nu_pct", "range_nm",
            "halfrange_pct", "sites_used", "in_spec")
        assert isinstance(row["wafer"], str) and type(row["slot"]) is int
        assert row["role"] in ("product", "monitor", "dummy")
        for k in ("mean_nm", "sigma_nm", "nu_pct", "range_nm", "halfrange_pct"):
            assert row[k] is None or isinstance(row[k], float)
        assert type(row["sites_used"]) is int
        assert row["in_spec"] is None or isinstance(row["in_spec"], bool)
    assert not list(tmp_path.glob(".*.tmp"))          # atomic write left no temporary file


def test_summary_json_values_match_hand_computation(small_lot, tmp_path):
    # Grand mean and WTW NU % = 100 s / mean over product wafers, n - 1 sample sigma
    # (common practice, no source); monitors and wafers with < 5 usable sites left out.
    ds, cfg = small_lot
    doc = strict_json(write_summary_json(lot_view(ds, cfg), tmp_path).read_text("utf-8"))
    t, ok = ds["thickness"].values, ds["fit_ok"].values
    means = [np.nanmean(np.where(ok[i], t[i], np.nan)) for i in range(8)]
    counted = [i for i in range(8) if ROLES8[i] == "product" and ok[i].sum() >= 5]
    assert counted == [0, 1, 2, 3, 5, 7]               # monitor (4) and 3-site wafer (6) out
    m = np.array([means[i] for i in counted])
    grand = m.sum() / m.size
    nu = 100 * math.sqrt(((m - grand) ** 2).sum() / (m.size - 1)) / grand
    # float rounding of sums over 6 wafers (the NU % divides two of them: looser)
    assert doc["lot"]["mean_nm"] == pytest.approx(grand, rel=1e-12)
    assert doc["lot"]["wtw_pct"] == pytest.approx(nu, rel=1e-10)
    assert doc["lot"]["excluded_wafers"] == ["W10"]
    by_id = {r["wafer"]: r for r in doc["wafers"]}
    for i, w in enumerate(ds.wafer.values):
        h = hand_stats(t[i], ok[i])
        r = by_id[str(w)]
        assert r["slot"] == int(ds.slot.values[i]) and r["sites_used"] == h["sites_used"]
        for k in ("mean_nm", "sigma_nm", "nu_pct", "range_nm", "halfrange_pct"):
            assert r[k] == pytest.approx(h[k], rel=1e-12)     # float rounding of 13 sites
        # in spec: |mean - target| <= tol % of target (common practice, no source)
        if str(w) == "W10":
            assert r["in_spec"] is None and r["flag"] == "excluded"   # not judged: 3 sites
        else:
            assert r["in_spec"] == (abs(h["mean_nm"] - TARGET) <= TOL / 100 * TARGET)
    assert by_id["W06"]["in_spec"] is False and by_id["W09"]["in_spec"] is True
    assert by_id["W06"]["flag"] == "flagged"           # off target, but not at a boat end
    assert doc["lot"]["in_spec_count"] == 5            # 6 counted product wafers, W06 out


def test_in_spec_is_null_without_target(small_lot, tmp_path):
    # Without a target there is nothing to judge in-spec against (common practice, no source).
    ds, _ = small_lot
    view = lot_view(ds, make_config(target=False, monitors=(8,)))
    doc = summary_dict(view)
    assert all(r["in_spec"] is None for r in doc["wafers"])
    assert doc["lot"]["in_spec_count"] is None
    assert "no target" in view.verdict


def test_excluded_wafer_is_named_in_warnings(small_lot):
    # A wafer mean from 3 sites does not stand for the wafer: left out, and said so
    # (common practice, no source).
    ds, cfg = small_lot
    view = lot_view(ds, cfg)
    assert view.excluded == ("W10",)
    assert any("W10" in w and "3 usable sites" in w for w in view.warnings)
    assert any("failed the fit" in w for w in view.warnings)     # 12 failed sites reported
    assert len(view.failed_sites) == 12
    assert {f.wafer for f in view.failed_sites} == {"W05", "W10"}
    assert view.wtw.n_missing == 1 and view.wtw.missing_ids == ["W10"]
    # with the limit lowered to 3 sites the wafer counts again
    relaxed = lot_view(ds, cfg, min_sites=3)
    assert relaxed.excluded == () and relaxed.wtw.n_used == 7
    assert DEFAULT_MIN_SITES == 5
    with pytest.raises(ValueError):
        lot_view(ds, cfg, min_sites=0)


# --------------------------------------------------------------------------- edge slots

@pytest.mark.parametrize("seed", range(5))
@pytest.mark.parametrize("target", [True, False], ids=["target", "no-target"])
def test_load_end_drop_gives_edge_slots_4_5(seed, target, tmp_path):
    # Two product slots next to the load-end dummies 3 % thin, 0.5 % site noise: an edge
    # effect at the load end, fixed by 2 more dummies there (common practice, no source;
    # flagged by the spec band, or without a target by the median/MAD rule, Hampel 1974).
    slots = range(4, 16)                               # 12 product slots, dummies 1-3, 16-18
    ds = make_lot(seed, slots=slots, true_nm={4: 970.0, 5: 970.0})
    cfg = make_config(target=target, boat=18, dummies=(1, 2, 3, 16, 17, 18),
                      zones=(("load", 1, 9), ("source", 10, 18)))
    doc = strict_json(write_summary_json(lot_view(ds, cfg), tmp_path).read_text("utf-8"))
    assert doc["lot"]["edge_slots"] == [4, 5]
    assert doc["lot"]["extra_dummies"] == {"load": 2, "source": 0}
    assert doc["lot"]["flat_zone"] == [6, 15]
    assert [r["flag"] for r in doc["wafers"][:3]] == ["edge", "edge", ""]


def test_verdict_names_edge_slots_and_dummies():
    # The one-line verdict an engineer reads first (filmmap's own wording).
    ds = make_lot(1, slots=range(4, 16), true_nm={4: 970.0, 5: 970.0})
    view = lot_view(ds, make_config(boat=18, dummies=(1, 2, 3, 16, 17, 18)))
    v = view.verdict
    assert "10 of 12 product wafers in spec" in v
    assert "edge slots at the load end: 4, 5" in v
    assert "add 2 dummies at the load end" in v
    assert "source end" not in v


def test_no_boat_section_uses_highest_slot(small_lot):
    # Without [boat] the boat size is unknown; the highest measured slot is the honest
    # lower bound, and the report says so (common practice, no source).
    ds, _ = small_lot
    view = lot_view(ds, make_config(boat=None, zones=()))
    assert view.boat_size == int(ds.slot.max()) == 11
    assert not view.boat_from_config
    assert any("no [boat]" in w for w in view.warnings)
    assert view.layout_role[:3] == ("empty",) * 3      # dummy slots unknown without [boat]


# --------------------------------------------------------------------------- summary.csv rows

def test_summary_csv_rows(small_lot, tmp_path):
    # The summary.csv columns the lead switches to: pinned ones first, extras after.
    ds, cfg = small_lot
    view = lot_view(ds, cfg)
    header, rows = summary_csv_rows(view)
    assert header[:10] == ["wafer", "slot", "role", "mean_nm", "sigma_nm", "nu_pct", "range_nm",
                           "halfrange_pct", "sites_used", "in_spec"]
    assert header == list(SUMMARY_CSV_COLUMNS)
    assert [r[0] for r in rows] == [f"W{s:02d}" for s in range(4, 12)]
    w10 = rows[6]
    assert w10[8] == 3 and w10[9] == ""                # 3 sites, in_spec not judged
    w06 = rows[2]
    # the mean by hand (hand_stats), written with 4 decimals: half a unit of the last one
    hand = hand_stats(ds["thickness"].values[2], ds["fit_ok"].values[2])["mean_nm"]
    assert w06[9] == "false" and float(w06[3]) == pytest.approx(hand, abs=5e-5)
    path = write_summary_csv(view, tmp_path / "summary.csv")
    text = path.read_text("utf-8").splitlines()
    assert text[0] == ",".join(SUMMARY_CSV_COLUMNS) and len(text) == 9
