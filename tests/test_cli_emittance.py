"""``beamdiag emittance``: JSON lines, summary, exit status and --store, on the folders in tests/data/scans.

The folders are made by tests/data/scans/make_scans.py from the beam of METHODS 6.4
(eps = 1e-6 m rad, beta = 10 m, alpha = -1 in both planes).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest

from diagnostics.cli import main

SCANS = Path(__file__).resolve().parent / "data" / "scans"
GOOD = SCANS / "q05_sizes"
UNPHYSICAL = SCANS / "unphysical_set"
NO_WAIST = SCANS / "q07_no_waist"
BROKEN = SCANS / "broken"


def _no_nan(text: str):
    def refuse(name):
        raise AssertionError(f"non-JSON constant {name} in output")

    return json.loads(text, parse_constant=refuse)


def run_json(capsys, *args):
    code = main(["emittance", *map(str, args), "--json"])
    out = capsys.readouterr()
    return code, [_no_nan(line) for line in out.out.splitlines() if line.strip()], out.err


def test_json_record_of_a_good_scan(capsys):
    code, records, _ = run_json(capsys, GOOD)
    assert code == 0
    (rec,) = records
    assert rec["file"] == str(GOOD) and rec["name"] == "Q-05 scan 08:15" and rec["kind"] == "quadrupole"
    assert rec["error"] is None and rec["flags"] == []
    for plane in ("x", "y"):
        p = rec[plane]
        for key in ("emittance_m_rad", "emittance_err_m_rad", "norm_emittance_m_rad", "norm_emittance_err_m_rad",
                    "beta_m", "beta_err_m", "alpha", "alpha_err", "flags"):
            assert key in p
        # 2 % noise on 9 settings: the fit is within 4 standard errors of the true 1e-6 m rad
        assert abs(p["emittance_m_rad"] - 1e-6) < 4 * p["emittance_err_m_rad"]
        assert p["reference_point"] == "quadrupole entrance"
        assert p["thin_lens"]["emittance_m_rad"] > 0
    assert len(rec["steps"]) == 9
    assert rec["steps"][4]["setting"] == pytest.approx(2.0, rel=1e-12)  # given as a gradient
    assert rec["steps"][0]["setting_name"] == "k1_per_m2"


def test_unphysical_and_waist_flags_and_failed_folder(capsys):
    code, records, _ = run_json(capsys, UNPHYSICAL, NO_WAIST, BROKEN)
    assert code == 1  # the broken folder failed, after the others were done
    unphys, waist, broken = records
    assert "unphysical" in unphys["flags"]
    assert unphys["x"]["emittance_m_rad"] is None and unphys["x"]["beta_m"] is None
    assert "waist_not_crossed" in waist["x"]["flags"]
    assert broken["file"] == str(BROKEN)
    assert "kinetic_energy_MeV" in broken["error"] and "\n" not in broken["error"]


def test_parent_folder_expands_to_its_scan_folders(capsys):
    code, records, _ = run_json(capsys, SCANS)
    assert code == 1
    assert [Path(r["file"]).name for r in records] == ["broken", "q05_sizes", "q07_no_waist", "unphysical_set"]


def test_method_bootstrap_and_resolution_options(capsys):
    _, (thick,), _ = run_json(capsys, GOOD)
    _, (thin,), _ = run_json(capsys, GOOD, "--method", "thin")
    assert thin["options"]["method"] == "thin" and thin["x"]["thin_lens"] is None
    assert thin["x"]["emittance_m_rad"] == pytest.approx(thick["x"]["thin_lens"]["emittance_m_rad"], rel=1e-12)
    _, (boot,), _ = run_json(capsys, GOOD, "--bootstrap", "200", "--seed", "3")
    assert boot["x"]["bootstrap"]["n_samples"] == 200
    _, (res,), _ = run_json(capsys, GOOD, "--resolution-m", "1e-4")
    assert res["options"]["resolution_m"] == 1e-4
    assert res["x"]["emittance_m_rad"] != thick["x"]["emittance_m_rad"]


def test_human_summary_in_mm_mrad(capsys):
    code = main(["emittance", str(GOOD)])
    out = capsys.readouterr().out
    assert code == 0
    assert "mm mrad" in out and "beta" in out and "quadrupole entrance" in out
    # the x emittance in mm mrad (1 mm mrad = 1e-6 m rad) appears with 4 significant digits
    _, (rec,), _ = run_json(capsys, GOOD)
    assert f"{rec['x']['emittance_m_rad'] * 1e6:#.4g}" in out


def test_failed_folder_in_summary_mode_goes_to_stderr(capsys):
    code = main(["emittance", str(BROKEN)])
    captured = capsys.readouterr()
    assert code == 1
    assert "kinetic_energy_MeV" in captured.err and captured.out == ""


@pytest.mark.parametrize("bad", [["--bootstrap", "-1"], ["--resolution-m", "abc"], ["--method", "thinner"]])
def test_bad_options_are_usage_errors(capsys, bad):
    with pytest.raises(SystemExit) as info:
        main(["emittance", str(GOOD), *bad])
    assert info.value.code == 2
    capsys.readouterr()


def test_store_records_the_results(tmp_path, capsys):
    pytest.importorskip("diagnostics.store")
    import pyarrow.parquet as pq

    store = tmp_path / "store"
    code = main(["emittance", str(GOOD), str(UNPHYSICAL), "--json", "--store", str(store)])
    err = capsys.readouterr().err
    assert code == 0
    assert "stored 2 result(s)" in err
    files = sorted((store / "results" / "scans").rglob("*.parquet"))
    assert files
    table = pq.read_table(files[0]).to_pandas()
    assert len(table) == 2
    eps = table["x_emittance_m_rad"].tolist()
    assert any(v is None or (isinstance(v, float) and math.isnan(v)) for v in eps)  # the unphysical one
    assert any(isinstance(v, float) and v == pytest.approx(1e-6, rel=0.1) for v in eps)
