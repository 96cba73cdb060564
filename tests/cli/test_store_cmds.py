"""The store's commands: init, ingest (exit codes, messages, --json), quotes (table, --json)."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest

from calib.cli import main
from calib.store.migrate import head_revision

FUTURES = "trade_date,commodity,delivery,settle\n2031-03-03,QRX,2031-05-01,50\n"
OPTIONS = (
    "trade_date,commodity,delivery,expiry,kind,strike,premium\n"
    "2031-03-03,QRX,2031-05-01,2031-04-25,call,50,2.1\n"
)


def run(capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch, *args: str):  # type: ignore[no-untyped-def]
    monkeypatch.setattr(sys, "argv", ["calib", *args])
    with pytest.raises(SystemExit) as exit_info:
        main()
        raise SystemExit(0)
    out = capsys.readouterr()
    return exit_info.value.code or 0, out.out, out.err


def test_init_ingest_quotes_round_trip(
    db_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    code, out, _ = run(capsys, monkeypatch, "init", "--db", db_url)
    assert code == 0 and "nothing to do" in out
    fut = tmp_path / "f.csv"
    fut.write_text(FUTURES)
    code, _, err = run(capsys, monkeypatch, "ingest", "futures", str(fut), "--db", db_url)
    assert code == 2 and err.count("\n") == 1 and "unknown commodity 'QRX'" in err
    code, out, _ = run(
        capsys, monkeypatch, "ingest", "futures", str(fut), "--create", "--db", db_url
    )
    assert code == 0 and "1 accepted, 0 rejected" in out and "registered commodity QRX" in out
    code, out, _ = run(capsys, monkeypatch, "ingest", "futures", str(fut), "--db", db_url)
    assert code == 0 and "already loaded" in out
    opt = tmp_path / "o.csv"
    opt.write_text(OPTIONS + "2031-03-03,QRX,2031-05-01,2031-04-25,put,50,-1\n")
    code, out, _ = run(capsys, monkeypatch, "ingest", "options", str(opt), "--db", db_url)
    assert code == 1 and f"{opt}:3: premium: must be > 0: '-1'" in out
    code, out, _ = run(capsys, monkeypatch, "ingest", "options", str(opt), "--db", db_url)
    assert code == 1 and "already loaded" in out and "1 row(s) of it are in quarantine" in out
    code, out, _ = run(capsys, monkeypatch, "quotes", "QRX", "--date", "2031-03-03", "--db", db_url)
    assert code == 0 and "1 futures, 1 options, 0 rates" in out and "2031-05-01" in out
    # options before their day's zero curve: accepted, checked with r = 0, said, exit 1
    clean = tmp_path / "o2.csv"
    clean.write_text(OPTIONS.replace("call,50,2.1", "call,51,1.6"))
    code, out, _ = run(capsys, monkeypatch, "ingest", "options", str(clean), "--db", db_url)
    assert code == 1 and "1 accepted, 0 rejected" in out and "checked with r = 0" in out
    code, out, _ = run(
        capsys, monkeypatch, "quotes", "QRX", "--date", "2031-03-03", "--json", "--db", db_url
    )
    payload = json.loads(out)
    assert payload["futures"][0]["settle"] == 50.0
    assert payload["options"][0]["premium"] == 2.1 and payload["options"][0]["bid"] is None


def test_strict_and_json_exit_codes(
    db_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    fut = tmp_path / "f.csv"
    fut.write_text(FUTURES + "2031-03-03,QRX,2031-06-01,zero\n")
    code, out, _ = run(
        capsys,
        monkeypatch,
        "ingest",
        "futures",
        str(fut),
        "--create",
        "--strict",
        "--json",
        "--db",
        db_url,
    )
    payload = json.loads(out)
    assert code == 2 and payload["exit_code"] == 2
    (report,) = payload["files"]
    assert report["status"] == "rejected" and report["problems"][0]["field"] == "settle"
    missing = tmp_path / "none.csv"
    code, out, _ = run(
        capsys, monkeypatch, "ingest", "futures", str(missing), "--json", "--db", db_url
    )
    assert code == 2 and json.loads(out)["files"][0]["reason"] == "no such file"


def test_commands_need_an_initialised_database(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("CALIB_DB", raising=False)
    code, _, err = run(capsys, monkeypatch, "quotes", "QRX", "--date", "2031-03-03")
    assert code == 2 and "calib init" in err and not (tmp_path / "db").exists()
    code, out, _ = run(capsys, monkeypatch, "init", "--json")
    assert code == 0 and json.loads(out)["after"] == head_revision()
    assert (tmp_path / "db" / "calib.sqlite").exists()


def test_american_commodity_quotes_list_style_and_early_exercise(
    db_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """``--exercise american`` on registration makes the options American unless a row says
    otherwise; ``calib quotes`` lists each style and early-exercise premium (``--json`` too)."""
    fut = tmp_path / "f.csv"
    fut.write_text(FUTURES)
    args = ("--create", "--exercise", "american", "--db", db_url)
    assert run(capsys, monkeypatch, "ingest", "futures", str(fut), *args)[0] == 0
    rates = tmp_path / "r.csv"
    rates.write_text("trade_date,maturity,zero_rate\n2031-03-03,2032-03-03,0.08\n")
    assert run(capsys, monkeypatch, "ingest", "rates", str(rates), "--db", db_url)[0] == 0
    opt = tmp_path / "o.csv"
    opt.write_text(
        "trade_date,commodity,delivery,expiry,kind,strike,premium,exercise\n"
        "2031-03-03,QRX,2031-05-01,2031-04-25,put,60,10.2,\n"  # the commodity's default
        "2031-03-03,QRX,2031-05-01,2031-04-25,call,50,2.1,european\n"
    )
    code, out, _ = run(capsys, monkeypatch, "ingest", "options", str(opt), "--db", db_url)
    assert code == 0, out
    code, out, _ = run(capsys, monkeypatch, "quotes", "QRX", "--date", "2031-03-03", "--db", db_url)
    assert code == 0 and "exercise" in out and "early_exercise" in out
    assert "american" in out and "european" in out
    code, out, _ = run(
        capsys, monkeypatch, "quotes", "QRX", "--date", "2031-03-03", "--json", "--db", db_url
    )
    put, call = json.loads(out)["options"]
    assert put["exercise"] == "american" and put["early_exercise"] > 0.0
    assert call["exercise"] == "european" and call["early_exercise"] == 0.0
