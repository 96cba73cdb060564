"""The run commands end to end on a generated, ingested year: estimate, estimates, fit,
approve, reject, runs, show, latest, rerun (text, --json, exit codes)."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest

from calib.model.twofactor import PARAM_NAMES
from calib.store.engine import Store
from tests.conftest import Cli
from tests.workflows.small_day import load_scenario, write_estimate_file


@pytest.mark.slow
def test_morning_run_from_the_command_line(store: Store, tmp_path: Path, cli: Cli) -> None:
    data = load_scenario(store, tmp_path)
    day, before = str(data.days[-1]), str(data.days[-2])
    calib = cli

    code, _, err = calib("fit", "QLM", "--date", day)
    assert code == 2 and err.count("\n") == 1 and "no converged historical estimate" in err

    code, out, err = calib("estimate", "QLM", "--from", str(data.days[0]), "--to", day, "--json")
    assert code == 0 and "maximising the likelihood" in err
    estimated = json.loads(out)
    assert estimated["converged"] and set(PARAM_NAMES) <= set(estimated)
    path = write_estimate_file(tmp_path / "e.json", data.scenario)
    code, out, _ = calib("estimates", "import", "QLM", str(path))
    assert code == 0 and "(imported)" in out
    code, out, _ = calib("estimates", "QLM", "--json")
    assert [e["source"] for e in json.loads(out)] == ["imported", "kalman"]

    held = tmp_path / "held.toml"
    held.write_text('[calibration]\nmode = "held_rho"\n')
    code, out, _ = calib(
        "fit", "QLM", "--date", before, "--settings", str(held), "--json", "--by", "A. Quant"
    )
    first = json.loads(out)
    assert code == 0 and first["status"] == "candidate" and first["change"] is None
    assert first["created_by"] == "A. Quant"
    assert set(PARAM_NAMES) <= set(first) and first["mode"] == "held_rho"
    code, out, _ = calib("approve", str(first["run_id"]), "--by", "risk", "--note", "ok")
    assert code == 0 and f"run {first['run_id']} approved by risk" in out

    # --auto-approve with a failed gate: a verdict line saying why, exit 3, still a candidate
    strict = tmp_path / "strict.toml"
    strict.write_text('[calibration]\nmode = "held_rho"\n[gates]\nmax_rmse_vol_points = 1e-6\n')
    code, out, _ = calib("fit", "QLM", "--date", day, "--settings", str(strict), "--auto-approve")
    assert code == 3 and "FAIL  rmse_vol" in out
    assert "verdict: not approved because rmse_vol " in out and "against limit 1e-06" in out
    code, out, _ = calib("reject", out.split(":")[0].split()[1], "--by", "risk", "--note", "x")
    assert code == 0

    code, out, _ = calib("fit", "QLM", "--date", day, "--settings", str(held), "--auto-approve")
    assert code == 0 and "gates:" in out and "pass  jump_rho" in out
    assert "verdict: approved (every gate passed)" in out and "binding constraints:" in out
    assert "vol points (max " in out.split("\n")[1]  # the fit line leads with vol points
    code, out, _ = calib("latest", "QLM", "--json")
    latest = json.loads(out)
    assert latest["status"] == "approved" and latest["run_id"] == first["run_id"] + 2
    code, out, _ = calib("latest", "QLM", "--as-of", "2020-01-01")
    assert (code, out) == (2, ""), (out, _)
    code, out, _ = calib("latest", "QLM", "--history", "--json")
    assert [h["run_id"] for h in json.loads(out)] == [first["run_id"], latest["run_id"]]

    code, _, err = calib("reject", str(first["run_id"]), "--by", "risk", "--note", "late")
    assert code == 2 and "is superseded: it cannot become rejected" in err

    bad = tmp_path / "bad.toml"
    bad.write_text("[calibration]\nmin_days_to_expiry = 400.0\n")
    code, out, _ = calib("fit", "QLM", "--date", day, "--settings", str(bad), "--json")
    failed = json.loads(out)
    assert code == 1 and failed["status"] == "rejected" and failed["sigma_spot"] is None
    assert "TooFewQuotesError" in failed["failure_reason"]

    code, out, _ = calib("runs", "QLM")
    assert code == 0 and out.count("\n") == 5 and "superseded" in out and "failed" in out
    assert out.startswith("run  trade date  status") and " vp " in out  # header; vol points
    code, out, _ = calib("show", str(latest["run_id"]), "--json")
    shown = json.loads(out)
    assert len(shown["residuals"]) == shown["diagnostics"]["n_quotes"]
    assert [e["to_status"] for e in shown["events"]] == ["candidate", "approved"]
    # residuals by contract: expiry, strike, kind, premiums, vols, residual in vol points
    assert set(shown["residuals"][0]) >= {"expiry", "strike", "kind", "vol_residual"}
    code, out, _ = calib("show", str(latest["run_id"]))
    assert code == 0 and re.search(r"expiry +kind +ex +strike", out) and "resid vp" in out
    code, out, _ = calib("rerun", str(latest["run_id"]))
    assert code == 0 and "identical, bit for bit" in out
    code, _, err = calib("show", "999")
    assert code == 2 and "no calibration run 999" in err
