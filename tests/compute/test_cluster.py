"""Backfill on a Dask cluster (a ``LocalCluster`` of two worker processes started here):
the same stored runs as local processes, every day stored once when a worker is killed part
way, several commodities in one run, and the refusals of ``--cluster``."""

from __future__ import annotations

import json
import os
import signal
import socket
import sys
from collections.abc import Iterator
from contextlib import closing
from pathlib import Path
from typing import Any

import pytest
from distributed import Client, LocalCluster

from calib.compute.cluster import CONNECT_SECONDS, DaskExecutor, connect
from calib.compute.executor import InlineExecutor, ProcessExecutor, open_executor
from calib.errors import ClusterError
from calib.policy.settings import RunSettings
from calib.store.engine import Store, make_store
from calib.store.migrate import upgrade
from calib.store.runs import require_run, run_keys
from calib.workflows import backfill as flow
from calib.workflows.estimates import import_estimate
from calib.workflows.ingest import NewCommodity, ingest_file
from tests.cli.test_store_cmds import run
from tests.workflows.small_day import Loaded, load_with_estimate, write_estimate_file

FAST = RunSettings.from_dict({"calibration": {"refit_costs": False}})
N_DAYS = 8


@pytest.fixture(scope="module")
def cluster() -> Iterator[LocalCluster]:
    """Two worker processes of one thread each (what a small cluster looks like)."""
    with LocalCluster(
        n_workers=2,
        threads_per_worker=1,
        processes=True,
        dashboard_address=None,
        silence_logs=50,  # logging.CRITICAL: a killed worker is expected here
    ) as made:
        yield made


@pytest.fixture
def on_cluster(cluster: LocalCluster) -> Iterator[DaskExecutor]:
    with closing(connect(cluster.scheduler_address)) as executor:
        yield executor


@pytest.fixture
def sqlite_store(tmp_path: Path) -> Iterator[Store]:
    made = make_store(f"sqlite:///{tmp_path / 'cluster.sqlite'}")
    upgrade(made.engine)
    yield made
    made.engine.dispose()


@pytest.fixture
def loaded(sqlite_store: Store, tmp_path: Path) -> Loaded:
    return load_with_estimate(sqlite_store, tmp_path)


def _second_estimate(store: Store, loaded: Loaded, path: Path) -> int:
    """The same parameters imported again: a new estimate id, so every day is fitted again."""
    file = write_estimate_file(path, loaded.scenario)
    return import_estimate(store.sessions, loaded.code, file, by="tester").estimate_id


def _runs(store: Store, report: flow.BackfillReport) -> list[tuple[Any, ...]]:
    """What a stored run holds that the fit decides (ids, times and the input hash, which
    names the estimate id, aside)."""
    with store.sessions() as s:
        found = [require_run(session=s, run_id=d.run_id) for d in report.days]  # type: ignore[arg-type]
    return [(r.trade_date, r.outcome, r.fit, r.failure_reason) for r in found]


def test_a_cluster_stores_the_same_runs_as_local_processes(
    sqlite_store: Store,
    loaded: Loaded,
    on_cluster: DaskExecutor,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    monkeypatch.setattr(flow, "DAYS_PER_TASK", 3)  # both workers get days
    days = loaded.days[:N_DAYS]
    priced = RunSettings.from_dict({})  # re-fits without each binding constraint too
    local = flow.backfill(
        sqlite_store, loaded.code, days[0], days[-1], by="q", settings=priced,
        executor=ProcessExecutor(2),
    )  # fmt: skip
    second = _second_estimate(sqlite_store, loaded, tmp_path / "e2.json")
    remote = flow.backfill(
        sqlite_store, loaded.code, days[0], days[-1], by="q", settings=priced,
        estimate_id=second, executor=on_cluster,
    )  # fmt: skip
    assert remote.where == f"cluster {on_cluster.address}" and remote.workers == 2
    assert [d.trade_date for d in remote.days] == days  # stored in date order
    assert remote.count("fitted") == N_DAYS
    assert _runs(sqlite_store, remote) == _runs(sqlite_store, local)  # bit for bit


class KillAWorker:
    """A progress listener that SIGKILLs one cluster worker once the first batch is stored,
    while the other units are still out on the workers."""

    def __init__(self, client: Client) -> None:
        self.client = client
        self.killed: int | None = None

    def start(self, total: int, skipped: int) -> None:
        pass

    def advance(self, day: flow.BackfillDay) -> None:
        if self.killed is None:
            pids: dict[str, int] = self.client.run(os.getpid)
            self.killed = sorted(pids.values())[0]
            os.kill(self.killed, signal.SIGKILL)


def test_a_worker_killed_mid_run_still_leaves_every_day_stored_once(
    sqlite_store: Store,
    loaded: Loaded,
    cluster: LocalCluster,
    on_cluster: DaskExecutor,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    monkeypatch.setattr(flow, "DAYS_PER_TASK", 1)
    monkeypatch.setattr(flow, "DAYS_PER_WRITE", 2)
    days = loaded.days[:N_DAYS]
    killer = KillAWorker(on_cluster.client)
    report = flow.backfill(
        sqlite_store, loaded.code, days[0], days[-1], by="q", settings=FAST,
        executor=on_cluster, progress=killer,
    )  # fmt: skip
    assert killer.killed is not None
    assert [d.trade_date for d in report.days] == days and report.count("fitted") == N_DAYS
    with sqlite_store.sessions() as s:
        keys = run_keys(session=s, commodity=loaded.code, start=days[0], end=days[-1])
    assert sorted(k.trade_date for k in keys) == days  # every day once: none twice, none lost
    cluster.wait_for_workers(2, timeout=30)  # the nanny restarts it for the next test


def _second_commodity(store: Store, loaded: Loaded, code: str) -> None:
    """The scenario's files again under another commodity code, with its estimate."""
    new = NewCommodity(unit="tonne", currency="USD", calendar_rule="monthly")
    for kind in ("futures", "rates", "options"):
        source = loaded.folder / f"{kind}.csv"
        copy = loaded.folder / f"{code}-{kind}.csv"
        copy.write_text(source.read_text().replace(f",{loaded.code},", f",{code},"))
        ingest_file(store.sessions, copy, kind, by="tester", create=new)  # type: ignore[arg-type]
    file = write_estimate_file(loaded.folder / f"{code}.json", loaded.scenario)
    import_estimate(store.sessions, code, file, by="tester")


def test_several_commodities_in_one_run_match_one_at_a_time(
    sqlite_store: Store,
    loaded: Loaded,
    cluster: LocalCluster,
    on_cluster: DaskExecutor,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    other = "QLX"
    _second_commodity(sqlite_store, loaded, other)
    days = loaded.days[:4]
    jobs = [flow.BackfillJob(loaded.code, FAST), flow.BackfillJob(other, FAST)]
    both = flow.backfill_many(sqlite_store, jobs, days[0], days[-1], by="q", executor=on_cluster)
    assert [r.commodity for r in both] == [loaded.code, other]
    assert all([d.trade_date for d in r.days] == days for r in both)
    assert {d.commodity for d in both[1].days} == {other}
    # one commodity alone, in this process, with a new estimate: the same fits
    second = _second_estimate(sqlite_store, loaded, tmp_path / "e2.json")
    alone = flow.backfill(
        sqlite_store, loaded.code, days[0], days[-1], by="q", settings=FAST,
        estimate_id=second, executor=InlineExecutor(),
    )  # fmt: skip
    assert _runs(sqlite_store, alone) == _runs(sqlite_store, both[0])
    assert [f[2] for f in _runs(sqlite_store, both[1])] == [
        f[2] for f in _runs(sqlite_store, alone)
    ]
    with pytest.raises(flow.BackfillRangeError, match="named twice"):
        flow.backfill_many(sqlite_store, [jobs[0], jobs[0]], days[0], days[-1], by="q")
    # the command: every commodity, on the cluster, one report each
    url = sqlite_store.engine.url.render_as_string(hide_password=False)
    span = ["--from", str(days[0]), "--to", str(days[1]), "--db", url, "--json"]
    code, out, _ = run(
        capsys, monkeypatch, "backfill", "--all", *span, "--cluster", cluster.scheduler_address
    )
    payload = json.loads(out)
    assert code == 0 and [r["commodity"] for r in payload["commodities"]] == [loaded.code, other]
    assert all(
        r["fitted"] == 2 and r["where"].startswith("cluster ") for r in payload["commodities"]
    )


# --- refusals ----------------------------------------------------------------------------------


def _silent_port() -> str:
    """An address on this machine where nothing listens."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    return f"tcp://127.0.0.1:{port}"


@pytest.mark.parametrize(
    "command",
    [
        ["backfill", "QLM", "--from", "2031-01-06", "--to", "2031-01-10"],
        ["estimate", "QLM", "--from", "2031-06-30", "--to", "2031-12-31", "--rolling", "6m"],
    ],
    ids=["backfill", "rolling"],
)
def test_an_address_that_does_not_answer_is_refused_in_one_line_within_seconds(
    db_url: str,
    command: list[str],
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    import distributed

    address = _silent_port()
    waits: list[float] = []
    real = distributed.Client

    def client(*args: Any, **kwargs: Any) -> Any:
        # the real client, told to give up after a tenth of the wait asked for: the same
        # refusal, without idling the test for the whole connect timeout
        waits.append(kwargs["timeout"])
        return real(*args, **{**kwargs, "timeout": kwargs["timeout"] / 10})

    monkeypatch.setattr(distributed, "Client", client)
    code, out, err = run(capsys, monkeypatch, *command, "--cluster", address, "--db", db_url)
    assert code == 2 and out == ""
    assert err.count("\n") == 1 and err.startswith(f"error: --cluster {address}: no answer")
    # within seconds: the one attempt waits the connect timeout, a few seconds (not a clock
    # reading, which a loaded machine stretches)
    assert waits == [CONNECT_SECONDS] and CONNECT_SECONDS <= 10.0


def test_without_dask_the_cluster_option_is_refused_in_one_line(
    db_url: str, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setitem(sys.modules, "distributed", None)  # import distributed: ImportError
    command = ["backfill", "QLM", "--from", "2031-01-06", "--to", "2031-01-10"]
    code, out, err = run(capsys, monkeypatch, *command, "--cluster", "tcp://h:8786", "--db", db_url)
    assert code == 2 and out == ""
    assert (
        err
        == "error: --cluster tcp://h:8786: needs dask distributed (pip install 'calib[cluster]')\n"
    )


def test_workers_and_cluster_exclude_each_other() -> None:
    with pytest.raises(ClusterError, match="--workers is for local processes"):
        open_executor(2, "tcp://h:8786")


def test_commodity_choice_is_refused_when_empty_or_double(
    db_url: str, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    span = ["--from", "2031-01-06", "--to", "2031-01-10", "--db", db_url]
    code, _, err = run(capsys, monkeypatch, "backfill", *span)
    assert code == 2 and "name a commodity (COMMODITY or --commodity) or give --all" in err
    code, _, err = run(capsys, monkeypatch, "backfill", "QLM", "--all", *span)
    assert code == 2 and "not both" in err
    code, _, err = run(capsys, monkeypatch, "backfill", "--all", *span)
    assert code == 2 and "no commodity is registered" in err


def test_a_policy_study_on_a_cluster_matches_local_processes(
    tmp_path: Path, on_cluster: DaskExecutor
) -> None:
    from calib.store.runs import list_runs
    from tests.workflows.test_hedge_policies import Setup, _compare

    rows: dict[str, list[dict[str, Any]]] = {}
    runs: dict[str, list[tuple[Any, ...]]] = {}
    for name, executor in (("local", ProcessExecutor(2)), ("cluster", on_cluster)):
        folder = tmp_path / name
        folder.mkdir()
        store = make_store(f"sqlite:///{folder / 'study.sqlite'}")
        upgrade(store.engine)
        setup = Setup(load_with_estimate(store, folder), folder)
        # each policy's row, but for the settings file's path (a folder per run here)
        rows[name] = [
            {k: v for k, v in row.items() if k != "settings_file"}
            for row in _compare(store, setup, executor).to_list()
        ]
        with store.sessions() as s:
            found = list_runs(session=s, commodity=setup.loaded.code, limit=10_000)
        runs[name] = sorted(
            (r.study, r.trade_date, r.outcome, r.fit, r.failure_reason) for r in found
        )
        store.engine.dispose()
    assert runs["cluster"] == runs["local"] and len(runs["local"]) > 0  # the same study runs
    assert rows["cluster"] == rows["local"]  # the same P&L, trade by trade, bit for bit
