"""One signed report for a lot tested in several runs on several benches (``benchrun report
RESULTS --lot LOT``) and its verification (``benchrun verify``), which finds every run through
the results store and, for run folders that moved, through ``--runs DIR``.

The shared store is the suite's real throwaway PostgreSQL cluster (tests/pg_fixture.py) where
the point is several benches writing to one server; SQLite where it is not.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import uuid
from pathlib import Path

import pytest
from pdf_checks import fonts_not_embedded, missing_words, overlapping_words, page_words
from report_helpers import PASSPHRASE, make_signer
from test_multibench_ids import bench_file
from test_multibench_outage import Outage
from test_runner_support import write_sequence

from benchrun import cli
from benchrun.config import load_bench, load_sequence
from benchrun.report.sign import read_attachment
from benchrun.runner.execute import RunOptions, run_sequence
from benchrun.runner.simbench import simulated_bench
from benchrun.store.results import ResultsStore
from benchrun.store.rundata import read_manifest

LOT = "LT-0117"


def run_part(folder: Path, devices: str, bench_id: str, db: str, *, name: str,
             repeats: int = 1, **options):
    """One bench tests part of the lot into the shared store ``db``."""
    seq = write_sequence(folder, devices=devices, temperatures="[25 degC]", name=name,
                         repeats=repeats)
    bench = bench_file(folder, bench_id)
    with simulated_bench(load_bench(bench), load_sequence(seq)) as sim:
        outcome = run_sequence(seq, bench, RunOptions(
            out_dir=folder / bench_id, db_url=db, sim_resources=sim.resources,
            clock=sim.clock, ratings_lookup=sim.ratings, show_progress=False, **options))
    assert outcome.status == "complete", outcome.error
    return outcome


def new_schema(cluster) -> tuple[str, str]:
    """A fresh schema on the session cluster: (name, URL with it first on the search path)."""
    if not cluster.test_database:
        cluster.execute("CREATE DATABASE benchrun_test")
        cluster.test_database = "benchrun_test"
    schema = f"l_{uuid.uuid4().hex[:12]}"
    cluster.execute(f"CREATE SCHEMA {schema}", cluster.test_database)
    return schema, f"{cluster.url(cluster.test_database)}?options=-csearch_path%3D{schema}"


def signing_args(folder: Path) -> list[str]:
    files, _signer = make_signer(folder)
    secret = folder / "passphrase.txt"
    secret.write_text(PASSPHRASE + "\n")
    return ["--key", str(files.key_path), "--cert", str(files.cert_path),
            "--passphrase-file", str(secret)]


def cert_of(args: list[str]) -> str:
    return args[args.index("--cert") + 1]


def lot_report(db: str, pdf: Path, sign: list[str], *extra: str) -> dict:
    assert cli.main(["report", db, "--lot", LOT, *sign, "--out", str(pdf), *extra]) == 0
    data = read_attachment(pdf.read_bytes())
    assert data is not None
    return data


def pdf_text(pdf: Path) -> str:
    return subprocess.run(["pdftotext", str(pdf), "-"], capture_output=True, text=True,
                          timeout=60, check=True).stdout


@pytest.fixture(scope="module")
def split_lot(tmp_path_factory, pg_cluster):
    """Bench A tests SN0117-001 and -002, then bench B tests -003 and tests -001 again, both
    into one PostgreSQL store; the lot's report is issued from the store."""
    tmp = tmp_path_factory.mktemp("lotreport")
    schema, db = new_schema(pg_cluster)
    try:
        first = run_part(tmp, "[SN0117-001, SN0117-002]", "bench-a", db, name="a.yaml")
        second = run_part(tmp, "[SN0117-003, SN0117-001]", "bench-b", db, name="b.yaml")
        sign = signing_args(tmp)
        pdf = tmp / "reports" / f"report-{LOT}.pdf"
        pdf.parent.mkdir()
        data = lot_report(db, pdf, sign)
        yield {"tmp": tmp, "db": db, "first": first, "second": second, "sign": sign,
               "pdf": pdf, "data": data}
    finally:
        pg_cluster.execute(f"DROP SCHEMA IF EXISTS {schema} CASCADE", pg_cluster.test_database)


@pytest.mark.postgres
def test_the_report_names_every_bench_run_and_instrument(split_lot):
    data, first, second = split_lot["data"], split_lot["first"], split_lot["second"]
    assert data["kind"] == "lot" and data["lot"] == LOT
    assert [(r["run_id"], r["bench_id"]) for r in data["lot_runs"]] == [
        (first.run_id, "bench-a"), (second.run_id, "bench-b")]
    assert data["run_id"] == second.run_id  # registered under the newest run that counts
    text = pdf_text(split_lot["pdf"])
    flat = " ".join(text.split())
    for needle in ("bench-a", "bench-b", "Retest rule:", "Runs of the lot",
                   "Instruments per run"):
        assert needle in flat, needle
    # each run's instruments as its own run.json records them (from IEEE 488.2 *IDN?), under
    # a heading naming the run and its bench, and both run ids, word for word in the PDF
    expected = [first.run_id, second.run_id]
    for outcome, bench in ((first, "bench-a"), (second, "bench-b")):
        assert f"Run {outcome.run_id} on bench {bench}" in flat
        identities = read_manifest(outcome.run_dir)["instruments"]
        assert set(identities) >= {"scope", "pulse", "supply", "thermal", "handler"}
        for ident in identities.values():
            expected += [ident["manufacturer"], ident["model"], ident["serial"],
                         ident["firmware"]]
    printed = {word.rstrip(",;") for _, _, words in page_words(split_lot["pdf"])
               for word, *_ in words}
    assert sorted(set(expected) - printed) == []
    assert overlapping_words(split_lot["pdf"]) == []
    assert fonts_not_embedded(split_lot["pdf"]) == []


@pytest.mark.postgres
def test_the_report_grades_the_lot_as_grade_lot_does(split_lot, capsys):
    data = split_lot["data"]
    capsys.readouterr()
    assert cli.main(["grade", split_lot["db"], "--lot", LOT, "--json"]) == 0
    graded = json.loads(capsys.readouterr().out)
    assert data["lot_grade"]["devices"] == graded["devices"]
    assert data["disposition"] == graded["disposition"]
    assert data["lot_grade"]["plan"] == graded["plan"]  # the plan over the whole lot
    assert data["counts"]["devices"] == graded["statistics"]["count"] == 3
    assert sorted(d["serial"] for d in graded["devices"]) == [
        "SN0117-001", "SN0117-002", "SN0117-003"]


@pytest.mark.postgres
def test_a_retested_device_counts_its_latest_test_and_the_earlier_is_listed(split_lot):
    data, first, second = split_lot["data"], split_lot["first"], split_lot["second"]
    assert data["superseded"] == [{"serial": "SN0117-001", "run_id": first.run_id,
                                   "bench_id": "bench-a", "shots": 1,
                                   "replaced_by": second.run_id}]
    by_serial: dict[str, set[str]] = {}
    for row in data["shots"]:
        by_serial.setdefault(row["serial"], set()).add(row["run_id"])
    assert by_serial == {"SN0117-001": {second.run_id}, "SN0117-002": {first.run_id},
                         "SN0117-003": {second.run_id}}
    counted = {r["run_id"]: r["counted_devices"] for r in data["lot_runs"]}
    assert counted == {first.run_id: ["SN0117-002"],
                       second.run_id: ["SN0117-001", "SN0117-003"]}
    flat = " ".join(pdf_text(split_lot["pdf"]).split())
    assert "Superseded tests (kept in the store, not graded)" in flat
    assert missing_words(split_lot["pdf"], ["SN0117-001", first.run_id, "Replaced"]) == []


@pytest.mark.postgres
def test_verify_checks_every_run_found_through_the_store(split_lot, capsys):
    capsys.readouterr()
    code = cli.main(["verify", str(split_lot["pdf"]), "--cert", cert_of(split_lot["sign"])])
    out = capsys.readouterr().out
    assert code == 0, out
    assert "VERIFIED: every check holds." in out
    for outcome in (split_lot["first"], split_lot["second"]):
        assert f"checked   run {outcome.run_id}" in out
    assert "re-analysed from their own raw records" in out


@pytest.mark.postgres
def test_a_run_folder_moved_elsewhere_is_found_with_runs_and_named_without(split_lot,
                                                                          capsys, tmp_path):
    first = split_lot["first"]
    elsewhere = tmp_path / "archive" / "bench-a-disk"
    elsewhere.mkdir(parents=True)
    moved = elsewhere / first.run_dir.name
    shutil.move(str(first.run_dir), moved)
    try:
        capsys.readouterr()
        cert = cert_of(split_lot["sign"])
        code = cli.main(["verify", str(split_lot["pdf"]), "--cert", cert])
        captured = capsys.readouterr()
        assert code == 1
        assert f"NOT FOUND run {first.run_id} (bench bench-a): run folder not found" in \
            captured.out
        assert "--runs DIR" in captured.out and "NOT VERIFIED." in captured.out
        assert f"checked   run {split_lot['second'].run_id}" in captured.out
        assert "Traceback" not in captured.out + captured.err
        code = cli.main(["verify", str(split_lot["pdf"]), "--cert", cert,
                         "--runs", str(tmp_path / "archive")])
        out = capsys.readouterr().out
        assert code == 0, out
        assert f"folder {moved} (found by searching the folders given)" in out
    finally:
        shutil.move(str(moved), first.run_dir)


@pytest.mark.postgres
def test_a_changed_row_of_a_counted_shot_fails_verification(split_lot, capsys, pg_cluster):
    db, first = split_lot["db"], split_lot["first"]
    schema = db.rsplit("%3D", 1)[1]
    table = f"{schema}.shots"
    where = f"run_id = '{first.run_id}' AND serial = 'SN0117-002'"
    pg_cluster.execute(f"UPDATE {table} SET \"timestamp\" = \"timestamp\" || 'x' WHERE {where}",
                       pg_cluster.test_database)
    try:
        capsys.readouterr()
        code = cli.main(["verify", str(split_lot["pdf"]), "--cert",
                         cert_of(split_lot["sign"])])
        out = capsys.readouterr().out
        assert code == 1
        assert f"NO   manifest hashes match: run {first.run_id}: result rows" in out
    finally:
        pg_cluster.execute(f"UPDATE {table} SET \"timestamp\" = left(\"timestamp\", -1) "
                           f"WHERE {where}", pg_cluster.test_database)


# -- SQLite: what does not need several writers -----------------------------------------


@pytest.fixture(scope="module")
def sqlite_lot(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("sqlitelot")
    db = f"sqlite:///{tmp / 'shared.db'}"
    first = run_part(tmp, "[SN0117-001]", "bench-a", db, name="a.yaml")
    second = run_part(tmp, "[SN0117-002]", "bench-b", db, name="b.yaml")
    return tmp, db, first, second, signing_args(tmp)


def test_a_lot_report_needs_every_run_folder_and_says_how_to_name_it(sqlite_lot, capsys,
                                                                     tmp_path):
    _tmp, db, first, _second, sign = sqlite_lot
    moved = tmp_path / first.run_dir.name
    shutil.move(str(first.run_dir), moved)
    try:
        capsys.readouterr()
        pdf = tmp_path / "lot.pdf"
        code = cli.main(["report", db, "--lot", LOT, *sign, "--out", str(pdf)])
        err = capsys.readouterr().err
        assert code != 0 and not pdf.exists()
        assert f"run {first.run_id} (bench bench-a): run folder not found" in err
        assert "--runs DIR" in err and "Traceback" not in err
        data = lot_report(db, pdf, sign, "--runs", str(tmp_path))
        assert data["lot_runs"][0]["run_dir"] == str(moved.resolve())
        # grade --lot needs the folder too (bench and limits files), and takes --runs
        assert cli.main(["grade", db, "--lot", LOT]) != 0
        err = capsys.readouterr().err
        assert f"run(s) {first.run_id} of lot {LOT} was not found" in err and "--runs" in err
        assert cli.main(["grade", db, "--lot", LOT, "--runs", str(tmp_path)]) == 0
    finally:
        shutil.move(str(moved), first.run_dir)


def test_the_lot_report_goes_to_the_current_folder_by_default(sqlite_lot, monkeypatch,
                                                              tmp_path):
    _tmp, db, _first, _second, sign = sqlite_lot
    monkeypatch.chdir(tmp_path)
    assert cli.main(["report", db, "--lot", LOT, *sign]) == 0
    assert read_attachment((tmp_path / f"report-{LOT}.pdf").read_bytes())["kind"] == "lot"


def test_verify_takes_the_store_from_store_when_it_moved(sqlite_lot, capsys, tmp_path):
    tmp, db, _first, _second, sign = sqlite_lot
    pdf = tmp_path / "lot.pdf"
    lot_report(db, pdf, sign)
    moved = tmp_path / "copy-of-shared.db"
    shutil.move(str(tmp / "shared.db"), moved)
    try:
        capsys.readouterr()
        assert cli.main(["verify", str(pdf), "--cert", cert_of(sign)]) == 1
        out = capsys.readouterr().out
        assert "cannot open the results store" in out and "--store URL" in out
        assert "Traceback" not in out
        assert cli.main(["verify", str(pdf), "--cert", cert_of(sign),
                         "--store", str(moved)]) == 0
    finally:
        shutil.move(str(moved), tmp / "shared.db")


def test_a_later_run_of_the_lot_is_named_but_does_not_fail_the_report(sqlite_lot, capsys,
                                                                      tmp_path):
    tmp, db, _first, _second, sign = sqlite_lot
    pdf = tmp_path / "lot.pdf"
    lot_report(db, pdf, sign)
    later = run_part(tmp, "[SN0117-002]", "bench-c", db, name="c.yaml")
    capsys.readouterr()
    assert cli.main(["verify", str(pdf), "--cert", cert_of(sign), "--details"]) == 0
    out = capsys.readouterr().out
    assert f"does not name (made after it): {later.run_id}" in out


def test_lot_options_that_do_not_fit_are_refused_in_one_line(sqlite_lot, capsys):
    tmp, db, first, _second, sign = sqlite_lot
    for extra, words in ((["--limits", str(first.run_dir / "limits.yaml")], "limits.yaml"),
                         (["--run-id", first.run_id], "not both")):
        capsys.readouterr()
        assert cli.main(["report", db, "--lot", LOT, *sign, *extra]) != 0
        err = capsys.readouterr().err
        assert words in err and "Traceback" not in err
    assert cli.main(["report", str(first.run_dir), *sign, "--runs", str(tmp)]) != 0
    assert "use it with --lot" in capsys.readouterr().err


def test_a_one_run_report_copied_away_from_its_folder_verifies_with_runs(sqlite_lot, capsys,
                                                                         tmp_path):
    tmp, _db, first, _second, sign = sqlite_lot
    pdf = tmp_path / "one-run.pdf"
    assert cli.main(["report", str(first.run_dir), *sign, "--pdf", str(pdf)]) == 0
    capsys.readouterr()
    assert cli.main(["verify", str(pdf), "--cert", cert_of(sign)]) == 1
    assert "no run folder" in capsys.readouterr().out
    assert cli.main(["verify", str(pdf), "--cert", cert_of(sign), "--runs", str(tmp)]) == 0


# -- a lot tested through a database outage --------------------------------------------

#: What a report states about the lot, with what differs between two testings of the same
#: devices left out (run ids, times, report id, signer's time): disposition, reasons, counts,
#: every device's grades and values, the statistics and plan, every shot's metrics and flags.
def report_facts(data: dict) -> dict:
    grade = dict(data["lot_grade"])
    grade.pop("run_ids")
    shots = sorted(
        (row["serial"], row["point"]["index"], row["repeat"], row["attempt"], row["valid"],
         json.dumps(row["metrics"], sort_keys=True), tuple(row["flags"]), row["raw_ref"])
        for row in data["shots"])
    return {"disposition": data["disposition"], "reasons": data["disposition_reasons"],
            "counts": data["counts"], "devices": data["devices"], "lot_grade": grade,
            "shots": shots, "superseded": [(s["serial"], s["shots"])
                                           for s in data["superseded"]],
            "benches": [(r["bench_id"], r["counted_devices"], r["counted_shots"])
                        for r in data["lot_runs"]]}


@pytest.mark.postgres
def test_the_report_of_a_lot_tested_through_an_outage_states_the_same_facts(tmp_path,
                                                                            pg_cluster):
    sign = signing_args(tmp_path)
    reports = {}
    for label in ("calm", "outage"):
        folder = tmp_path / label
        folder.mkdir()
        schema, db = new_schema(pg_cluster)
        outage = Outage(pg_cluster, after=2, seconds=5.0, pace=0.5)
        try:
            hook = {"on_stored": outage, "db_outage_limit_s": 60.0,
                    "db_backoff_s": (0.3, 1.0)} if label == "outage" else {}
            try:
                run_part(folder, "[SN0117-001, SN0117-002]", "bench-a", db, name="a.yaml",
                         repeats=8, **hook)
            finally:
                outage.ensure_started()
            run_part(folder, "[SN0117-003, SN0117-001]", "bench-b", db, name="b.yaml",
                     repeats=8)
            if label == "outage":
                assert outage.restarted and outage.during >= 3  # tested while down
                log = next((folder / "bench-a").iterdir()) / "run.log"
                assert "results database unreachable" in log.read_text()
            reports[label] = lot_report(db, folder / "lot.pdf", sign)
            assert cli.main(["verify", str(folder / "lot.pdf"), "--cert", cert_of(sign)]) == 0
        finally:
            pg_cluster.execute(f"DROP SCHEMA IF EXISTS {schema} CASCADE",
                               pg_cluster.test_database)
    calm, through = report_facts(reports["calm"]), report_facts(reports["outage"])
    assert len(calm["shots"]) == 24  # 3 devices × 8 repeats counted, nothing lost or doubled
    assert calm == through


def test_devices_counted_from_a_run_that_did_not_complete_are_named(tmp_path, capsys):
    db = f"sqlite:///{tmp_path / 'shared.db'}"
    first = run_part(tmp_path, "[SN0117-001]", "bench-a", db, name="a.yaml")
    second = run_part(tmp_path, "[SN0117-002, SN0117-001]", "bench-b", db, name="b.yaml")
    with ResultsStore(db, create=False) as store:  # bench B's run stopped before its end
        store.update_run(second.run_id, status="stopped")
    sign = signing_args(tmp_path)
    data = lot_report(db, tmp_path / "lot.pdf", sign)
    # SN0117-001: the complete run counts, although bench B tested it later (retest rule)
    assert {r["run_id"]: r["counted_devices"] for r in data["lot_runs"]} == {
        first.run_id: ["SN0117-001"], second.run_id: ["SN0117-002"]}
    assert data["unfinished"] == ["SN0117-002"]
    assert data["superseded"][0]["run_id"] == second.run_id
    flat = " ".join(pdf_text(tmp_path / "lot.pdf").split())
    assert "Devices tested only in a run that did not complete (their shots count from the " \
           "latest such run): SN0117-002." in flat
    capsys.readouterr()
    assert cli.main(["verify", str(tmp_path / "lot.pdf"), "--cert", cert_of(sign)]) == 0
