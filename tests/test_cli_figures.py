"""`tallyward figures`: the planners' report of many detectors, CSV or JSON, from a real
process on a real database."""

from __future__ import annotations

import csv
import json

from service.pipeline import fit as fitting
from service.timefmt import format_utc
from tests.factories import load_network, small_network
from tests.test_cli import run


def test_figures_command_writes_csv_and_json_reports(database_url, engine, settings, tmp_path
                                                     ) -> None:
    """One row per detector: a fitted detector has AADT inside its interval and its share
    imputed; one without a baseline is listed with the reason, not dropped."""
    net = small_network(("bra3-nb-t1", "bra3-nb-t2"), history_days=14, test_days=1)
    load_network(engine, net)
    fitting.fit_many(settings, engine, detector_ids=["bra3-nb-t1"],
                     as_of_s=net.test_start_s, thresholds=False)
    out = tmp_path / "figures.csv"
    r = run(["figures", "--year", "2026", "--out", str(out), "--quiet", "--workers", "1"],
            database_url)
    assert r.returncode == 0, r.stderr
    rows = {row["detector_id"]: row for row in csv.DictReader(out.open())}
    assert set(rows) == {"bra3-nb-t1", "bra3-nb-t2"}
    t1 = rows["bra3-nb-t1"]
    assert float(t1["aadt_low"]) <= float(t1["aadt"]) <= float(t1["aadt_high"])
    assert 0.9 < float(t1["imputed_share"]) < 1.0 and t1["error"] == ""
    assert "no baseline" in rows["bra3-nb-t2"]["error"]
    js = tmp_path / "figures.json"
    r = run(["figures", "--year", "2026", "--out", str(js), "--quiet", "--detector",
             "bra3-nb-t1"], database_url)
    assert r.returncode == 0, r.stderr
    report = json.loads(js.read_text())
    assert report[0]["aadt"]["value"] == int(t1["aadt"])
    assert report[0]["period"]["from"] == format_utc(1767247200)  # 2026-01-01 local midnight


def test_figures_command_refuses_other_report_types(database_url, tmp_path) -> None:
    """--out must be .csv or .json: anything else is a clear error, nothing written."""
    r = run(["figures", "--year", "2026", "--out", str(tmp_path / "f.xlsx")], database_url)
    assert r.returncode != 0 and ".csv or .json" in r.stderr
