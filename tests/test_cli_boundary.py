"""The command line as a person meets it: one vocabulary, no tracebacks, no library noise,
signing without a terminal, and run folders that can be moved."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from test_runner_support import BENCH, write_sequence

from benchrun.cli import EXIT_BROKEN_PIPE, build_parser, main
from benchrun.errors import StoreError, user_message
from benchrun.report.keys import PASSPHRASE_ENV

ROOT = Path(__file__).resolve().parents[1]
PASS = "correct horse battery"


def cli(*args: str, env: dict | None = None, **kw) -> subprocess.CompletedProcess:
    """``benchrun ARGS`` in a child process with no terminal (stdin from /dev/null)."""
    full_env = {**os.environ, "PYTHONPATH": str(ROOT), **(env or {})}
    full_env.pop(PASSPHRASE_ENV, None) if env is None or PASSPHRASE_ENV not in env else None
    return subprocess.run([sys.executable, "-m", "benchrun.cli", *args], env=full_env,
                          stdin=subprocess.DEVNULL, capture_output=True, text=True,
                          timeout=300, **kw)


@pytest.fixture
def run_cli(monkeypatch, capsys):
    """``benchrun ARGS`` in this process with no terminal (stdin not a tty); returns
    (exit code, stdout, stderr). ``passphrase`` sets BENCHRUN_KEY_PASSPHRASE."""
    import io

    def call(*argv: str, passphrase: str | None = None):
        monkeypatch.setattr(sys, "stdin", io.StringIO(""))
        if passphrase is None:
            monkeypatch.delenv(PASSPHRASE_ENV, raising=False)
        else:
            monkeypatch.setenv(PASSPHRASE_ENV, passphrase)
        capsys.readouterr()
        code = main(list(argv))
        out, err = capsys.readouterr()
        return subprocess.CompletedProcess(argv, code, out, err)

    return call


@pytest.fixture(scope="module")
def identity(tmp_path_factory):
    from benchrun.report.keys import new_identity

    return new_identity("Q. Ashdown", tmp_path_factory.mktemp("keys"), PASS,
                        role="Quality Engineer")


@pytest.fixture(scope="module")
def simulated_run(tmp_path_factory, identity):
    """One device at 25 degC on the simulated bench, graded and reported (signed)."""
    folder = tmp_path_factory.mktemp("sim-run")
    seq = write_sequence(folder, devices="[SN0117-001]", temperatures="[25 degC]")
    out = folder / "runs"
    code = main(["run", str(seq), "--bench", str(BENCH), "--out", str(out), "--no-progress",
                 "--key", str(identity.key_path), "--cert", str(identity.cert_path),
                 "--passphrase-file", str(_secret_file(folder))])
    assert code == 0
    (run_dir,) = [p for p in out.iterdir() if p.is_dir()]
    assert (run_dir / "report.pdf").is_file()
    return run_dir


def _secret_file(folder: Path) -> Path:
    secret = folder / "passphrase"
    secret.write_text(PASS + "\n")
    secret.chmod(0o600)
    return secret


# -- 14: a run folder can be moved or copied ------------------------------------------------
def _no_trace(done: subprocess.CompletedProcess) -> None:
    assert "Traceback" not in done.stderr and "Traceback" not in done.stdout


def test_moved_run_folder_grades_reports_and_verifies(simulated_run, identity, tmp_path,
                                                      run_cli):
    cli = run_cli
    moved = tmp_path / "archive" / simulated_run.name
    shutil.copytree(simulated_run, moved)
    # the original place is gone: nothing may be looked up by the path recorded at run time
    recorded = json.loads((moved / "run.json").read_text())["run_dir"]
    assert Path(recorded) == simulated_run.resolve()
    hidden = simulated_run.with_name(simulated_run.name + ".away")
    simulated_run.rename(hidden)
    try:
        for source in (str(moved), str(moved / "results.db")):
            graded = cli("grade", source)
            _no_trace(graded)
            assert graded.returncode == 0, graded.stderr
            assert f"Limits: {moved / 'limits.yaml'}" in graded.stdout
        verified = cli("verify", str(moved / "report.pdf"), "--cert", str(identity.cert_path))
        assert verified.returncode == 0, verified.stdout + verified.stderr
        assert "VERIFIED" in verified.stdout
        reported = cli("report", str(moved / "results.db"), "--key", str(identity.key_path),
                       "--cert", str(identity.cert_path), passphrase=PASS)
        assert reported.returncode == 0, reported.stderr
        assert f"report   {moved / 'report.pdf'}" in reported.stdout
        assert cli("verify", str(moved / "report.pdf"), "--cert",
                   str(identity.cert_path)).returncode == 0
    finally:
        hidden.rename(simulated_run)


def test_copy_reads_its_own_files_not_the_originals(simulated_run, tmp_path):
    from benchrun.store.rundata import load_run

    copy = tmp_path / simulated_run.name
    shutil.copytree(simulated_run, copy)
    run = load_run(copy / "results.db")
    assert run.run_dir == copy.resolve()
    assert run.limits_path == copy.resolve() / "limits.yaml"


# -- 9: signing without a terminal -------------------------------------------------------------
def test_report_without_passphrase_or_terminal_says_what_to_do(simulated_run, identity, run_cli):
    cli = run_cli
    done = cli("report", str(simulated_run), "--key", str(identity.key_path), "--cert",
               str(identity.cert_path), "--pdf", str(simulated_run / "never.pdf"))
    _no_trace(done)
    assert done.returncode == 2
    assert "EOFError" not in done.stderr
    assert "no terminal to ask on" in done.stderr
    assert PASSPHRASE_ENV in done.stderr and "--passphrase-file" in done.stderr
    assert not (simulated_run / "never.pdf").exists()


def test_keys_new_without_passphrase_or_terminal(tmp_path, run_cli):
    cli = run_cli
    done = cli("keys", "new", "--name", "Q. Ashdown", "--out", str(tmp_path / "k"))
    _no_trace(done)
    assert done.returncode == 2 and "no terminal to ask on" in done.stderr
    assert not (tmp_path / "k").exists()


def test_run_without_passphrase_fires_nothing(tmp_path, identity):
    # a child process with stdin from /dev/null: the unattended case as a scheduler runs it
    seq = write_sequence(tmp_path, devices="[SN0117-001]", temperatures="[25 degC]")
    done = cli("run", str(seq), "--bench", str(BENCH), "--out", str(tmp_path / "runs"),
               "--no-progress", "--key", str(identity.key_path), "--cert",
               str(identity.cert_path))
    _no_trace(done)
    assert done.returncode == 2 and "no terminal to ask on" in done.stderr
    assert not (tmp_path / "runs").exists()


def test_passphrase_file_signs_unattended(simulated_run, identity, tmp_path, run_cli):
    cli = run_cli
    secret = _secret_file(tmp_path)
    pdf = tmp_path / "from-file.pdf"
    done = cli("report", str(simulated_run), "--key", str(identity.key_path), "--cert",
               str(identity.cert_path), "--passphrase-file", str(secret), "--pdf", str(pdf))
    assert done.returncode == 0, done.stderr
    assert pdf.is_file()
    made = cli("keys", "new", "--name", "B. Other", "--out", str(tmp_path / "k"),
               "--passphrase-file", str(secret))
    assert made.returncode == 0, made.stderr
    from benchrun.report.keys import load_signer

    assert load_signer(tmp_path / "k" / "b-other.key.pem", tmp_path / "k" / "b-other.cert.pem",
                       PASS).name == "B. Other"


def test_empty_or_missing_passphrase_file(tmp_path, identity, simulated_run, run_cli):
    cli = run_cli
    empty = tmp_path / "empty"
    empty.write_text("")
    for path, message in ((empty, "is empty"), (tmp_path / "missing", "cannot read")):
        done = cli("report", str(simulated_run), "--key", str(identity.key_path), "--cert",
                   str(identity.cert_path), "--passphrase-file", str(path))
        _no_trace(done)
        assert done.returncode == 2 and message in done.stderr


# -- 11: no traceback, no library noise --------------------------------------------------------
def test_output_piped_into_head_ends_quietly(tmp_path):
    from report_helpers import build_run

    # 12 devices: the JSON (~380 kB) is far more than a pipe holds (64 kB on Linux), so the
    # writer is still writing when head has gone
    run_dir = build_run(tmp_path, 12)
    command = (f"{sys.executable} -m benchrun.cli grade {run_dir} --json | head -c 10; "
               "exit ${PIPESTATUS[0]}")
    done = subprocess.run(["bash", "-c", command], capture_output=True, text=True,
                          env={**os.environ, "PYTHONPATH": str(ROOT)}, timeout=300)
    assert len(done.stdout) == 10
    assert done.stderr == ""  # no BrokenPipeError, no "Exception ignored" at exit
    assert done.returncode == EXIT_BROKEN_PIPE


def test_broken_pipe_returns_quietly(monkeypatch, capsys):
    def writes_to_a_closed_pipe(args):
        raise BrokenPipeError(32, "Broken pipe")

    parser = build_parser()
    args = parser.parse_args(["grade", "x"])
    monkeypatch.setattr("benchrun.cli.build_parser", lambda: parser)
    monkeypatch.setattr(parser, "parse_args", lambda argv: args)
    args.func = writes_to_a_closed_pipe
    assert main(["grade", "x"]) == EXIT_BROKEN_PIPE
    assert capsys.readouterr().err == ""


def test_database_errors_have_no_background_links():
    # SQLAlchemy appends "(Background on this error at: https://sqlalche.me/...)"
    exc = StoreError("cannot list runs: OperationalError: (sqlite3.OperationalError) no such "
                     "table: runs\n(Background on this error at: https://sqlalche.me/e/20/e3q8)")
    assert user_message(exc) == ("cannot list runs: OperationalError: (sqlite3.Operational"
                                 "Error) no such table: runs")


def test_database_error_on_the_command_line(tmp_path, run_cli):
    cli = run_cli
    import sqlite3

    db = tmp_path / "other.db"
    sqlite3.connect(db).execute("create table unrelated (x)").connection.close()
    done = cli("grade", str(db))
    _no_trace(done)
    assert done.returncode == 2
    assert "sqlalche.me" not in done.stderr and len(done.stderr.strip().splitlines()) == 1


def test_negative_verify_prints_no_library_traceback(simulated_run, tmp_path):
    from benchrun.report.keys import new_identity

    other = new_identity("B. Other", tmp_path / "other", PASS)
    done = cli("verify", str(simulated_run / "report.pdf"), "--cert", str(other.cert_path))
    assert done.returncode == 1
    assert "NOT VERIFIED" in done.stdout
    assert done.stderr == ""  # the signature library logs a traceback here unless silenced


def test_debug_lets_library_logs_through():
    import logging

    from benchrun.cli import quiet_libraries

    quiet_libraries(False)
    assert not logging.getLogger("pyhanko").isEnabledFor(logging.CRITICAL)
    quiet_libraries(True)
    assert logging.getLogger("pyhanko").isEnabledFor(logging.WARNING)
    assert logging.getLogger("pyhanko").propagate


def test_instrument_that_cannot_be_opened_is_named_not_hidden(tmp_path, run_cli):
    cli = run_cli
    import socket

    with socket.socket() as probe:  # a port nothing listens on
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    bench = tmp_path / "bench.yaml"
    bench.write_text(BENCH.read_text().replace(
        "scope:   {resource: sim", f'scope:   {{resource: "TCPIP0::127.0.0.1::{port}::SOCKET"'))
    seq = write_sequence(tmp_path, devices="[SN0117-001]", temperatures="[25 degC]")
    done = cli("run", str(seq), "--bench", str(bench), "--out", str(tmp_path / "runs"),
               "--no-progress")
    _no_trace(done)
    assert "_helpers" not in done.stderr + done.stdout
    assert f"cannot open TCPIP0::127.0.0.1::{port}::SOCKET" in done.stderr
    (manifest,) = (tmp_path / "runs").glob("*/run.json")
    error = json.loads(manifest.read_text())["error"]
    assert f"cannot open TCPIP0::127.0.0.1::{port}::SOCKET" in error and "_helpers" not in error


def test_unexpected_error_is_one_line_and_debug_shows_the_traceback(monkeypatch, capsys):
    import benchrun.commands.grade as grade

    def broken(args):
        raise ZeroDivisionError("division by zero")

    monkeypatch.setattr(grade, "run", broken)
    assert main(["grade", "x"]) == 70
    err = capsys.readouterr().err
    assert err.startswith("benchrun grade: error: internal error: ZeroDivisionError")
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert main(["--debug", "grade", "x"]) == 70
    assert "Traceback" in capsys.readouterr().err


# -- 13: one vocabulary ---------------------------------------------------------------------
def _options(command: str) -> set[str]:
    parser = build_parser()
    sub = next(a for a in parser._actions if a.dest == "command").choices[command]
    return {s for a in sub._actions if a.help != "==SUPPRESS==" for s in a.option_strings}


def test_signing_options_are_spelled_alike():
    for command in ("run", "report"):
        assert {"--key", "--cert", "--p12", "--role", "--passphrase-file"} <= _options(command)
        assert not any(o.startswith("--sign-") for o in _options(command))
    assert "--passphrase-file" in build_parser()._subparsers._group_actions[0].choices[
        "keys"]._subparsers._group_actions[0].choices["new"].format_help()


def test_old_spellings_still_work():
    parser = build_parser()
    args = parser.parse_args(["run", "s.yaml", "--bench", "b.yaml", "--sign-key", "k.pem",
                              "--sign-cert", "c.pem"])
    assert (args.key, args.cert) == (Path("k.pem"), Path("c.pem"))
    args = parser.parse_args(["report", "R", "--out", "x.pdf"])
    assert args.pdf == Path("x.pdf")
    args = parser.parse_args(["sim", "--clock-speedup", "50"])
    assert args.clock_speedup == 50.0


def test_simulator_options_match_between_run_and_sim():
    assert {"--sim-seed", "--sim-speedup"} <= _options("run")
    assert {"--seed", "--speedup"} <= _options("sim")
    assert "--clock-speedup" not in _options("sim")


def test_out_is_a_folder_and_the_report_file_is_pdf():
    assert "--out" not in _options("report") and "--pdf" in _options("report")
    for command in ("run", "demo"):
        assert "--out" in _options(command)


@pytest.mark.parametrize("argv", [["run", "", "--bench", "b.yaml"],
                                  ["run", "s.yaml", "--bench", "b.yaml", "--out", ""],
                                  ["report", "R", "--key", "k", "--cert", ""],
                                  ["verify", "r.pdf", "--data", ""],
                                  ["grade", "R", "--limits", " "],
                                  ["keys", "new", "--name", "A", "--out", ""],
                                  ["demo", "--out", ""]])
def test_empty_path_is_refused_not_shown_as_dot(argv, capsys):
    with pytest.raises(SystemExit) as info:
        build_parser().parse_args(argv)
    assert info.value.code == 2
    assert "empty path" in capsys.readouterr().err
