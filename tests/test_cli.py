"""The command line: exit codes, one-line errors, the served app's start checks (token, TLS,
the --log), the demo and report commands, and the app folder handed to the served notebook.
No browser here (tests/test_browser.py and tests/test_app_log.py drive the page), and no server
(tests/test_serve.py starts them)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path

import harness
import pandas as pd
import pytest

from qcexplore import cli
from qcexplore.app import serve
from qcexplore.demo import filling_line
from qcexplore.study import Study

REPO = Path(__file__).resolve().parents[1]


def environment(home: Path) -> dict[str, str]:
    """Jupyter writes only under ``home``; kernels import this checkout."""
    return harness.private_environment(home, python_path=[REPO])


DEMO_ARGS = [
    "--value", "net_g", "--subgroup", "round", "--time", "taken_at",
    "--factors", "crew", "shift", "nozzle", "--measured-by", "crew", "--lsl", "500",
    "--units", "g",
]  # fmt: skip


def run(args: list[str], capsys: pytest.CaptureFixture) -> tuple[int, str, str]:
    code = cli.main(args)
    out, err = capsys.readouterr()
    return code, out, err


def one_line_error(err: str) -> str:
    lines = err.strip().splitlines()
    assert len(lines) == 1, f"expected one line on stderr, got: {err!r}"
    assert "Traceback" not in err
    return lines[0]


@pytest.fixture(scope="module")
def demo_csv(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("demo") / "demo.csv"
    assert cli.main(["demo", "-o", str(path), "--days", "3"]) == 0
    return path


# ---- parsing --------------------------------------------------------------------------
def test_help_lists_commands_and_examples(capsys: pytest.CaptureFixture) -> None:
    code, out, _ = run(["--help"], capsys)
    assert code == 0
    assert all(word in out for word in ("app", "report", "demo", "examples:"))
    code, out, _ = run(["app", "--help"], capsys)
    assert code == 0
    assert "--token-file" in out and "--measured-by" in out and "--shifts" in out
    assert "QCEXPLORE_APP_TOKEN" in out and "--certfile" in out and "--max-pages" in out


def test_study_options_become_study_roles() -> None:
    args = cli.build_parser().parse_args(
        ["report", "x.csv", "-o", "r.html", "--value", "w", "--factors", "crew,shift",
         "nozzle", "--measured-by", "crew", "--shifts", "early=06:00, late=14:00,night=22:00",
         "--lsl", "500", "--target", "503", "--units", "g"]
    )  # fmt: skip
    assert cli.study_roles(args) == {
        "value": "w",
        "factors": ["crew", "shift", "nozzle"],
        "measured_by": ["crew"],
        "shifts": {"early": "06:00", "late": "14:00", "night": "22:00"},
        "spec": {"lsl": 500.0, "target": 503.0},
        "units": "g",
    }


def test_demo_roles_build_the_demo_study() -> None:
    args = cli.build_parser().parse_args(["app"])
    study = Study(filling_line(days=2)[0], **cli.study_roles(args, serve.DEMO_ROLES))
    assert study.value == "net_g" and study.subgroup == "round" and study.time == "taken_at"
    assert study.factors == ("crew", "shift", "nozzle") and study.measured_by == ("crew",)
    assert study.spec.lsl == 500.0 and study.units == "g"


@pytest.mark.parametrize(
    "args, names",
    [
        (["app", "--idle-timeout", "0"], "--idle-timeout"),
        (["app", "--connect-timeout", "-5"], "--connect-timeout"),
        (["app", "--max-pages", "0"], "--max-pages"),
        (["app", "--keyfile", "key.pem"], "--keyfile"),
        (["app", "--certfile", "missing-cert.pem"], "missing-cert.pem"),
        (["app", "--token-file", "missing-token.txt"], "missing-token.txt"),
        (["report", "x.csv"], "--output"),
        (["report", "x.csv", "-o", "r.html"], "--value"),
        (["report", "x.csv", "-o", "r.html", "--value", "w", "--shifts", "early"], "early"),
        (["report", "x.csv", "-o", "r.html", "--value", "w", "--lsl", "five"], "--lsl"),
        (["frobnicate"], "frobnicate"),
        (["demo", "-o", "demo.xlsx"], "demo.xlsx"),
    ],
)
def test_bad_arguments_exit_2_with_one_line(
    args: list[str],
    names: str,
    capsys: pytest.CaptureFixture,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    monkeypatch.chdir(tmp_path)
    code, _, err = run(args, capsys)
    assert code == 2
    assert names in one_line_error(err)


def test_the_token_is_never_taken_from_the_command_line(
    capsys: pytest.CaptureFixture, monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    monkeypatch.setattr(serve, "serve", lambda *a, **k: pytest.fail("server started"))
    secret = "s3cret-on-the-command-line"
    for args in (["app", "--token", secret], [f"--token={secret}"], ["app", "--token"]):
        code, _, err = run(args if args[0] == "app" else ["app", *args], capsys)
        assert code == 2 and "QCEXPLORE_APP_TOKEN" in one_line_error(err)
        assert secret not in err  # not repeated where a log or a screen would keep it


def test_the_token_comes_from_a_file_or_the_environment(tmp_path: Path) -> None:
    token = "t" * 24
    (tmp_path / "token").write_text(f"  {token}  \nsecond line ignored\n")
    environ = {serve.TOKEN_ENV: "e" * 20, "OTHER": "x"}
    assert serve.read_token(tmp_path / "token", environ) == token
    assert serve.TOKEN_ENV not in environ  # read once and removed: kernels do not inherit it
    environ = {serve.TOKEN_ENV: "e" * 20}
    assert serve.read_token(None, environ) == "e" * 20 and environ == {}
    assert serve.read_token(None, {}) is None
    (tmp_path / "short").write_text("abc\n")
    with pytest.raises(cli.QCDataError, match="3 characters long"):
        serve.read_token(tmp_path / "short", {})
    with pytest.raises(cli.QCDataError, match="0 characters long"):
        serve.read_token(None, {serve.TOKEN_ENV: "   "})


def test_a_certificate_that_does_not_fit_its_key_is_refused(tmp_path: Path) -> None:
    first, second = (
        harness.make_certificate(tmp_path / "a"),
        harness.make_certificate(tmp_path / "b"),
    )
    assert serve.tls_context(*first) is not None
    with pytest.raises(cli.QCDataError, match="certificate"):
        serve.tls_context(first[0], second[1])
    (tmp_path / "junk.pem").write_text("not a certificate")
    with pytest.raises(cli.QCDataError, match="junk.pem"):
        serve.tls_context(str(tmp_path / "junk.pem"), None)


def test_busy_port_exits_2_before_serving(
    capsys: pytest.CaptureFixture, monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    import socket

    monkeypatch.chdir(tmp_path)

    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        port = taken.getsockname()[1]
        code, _, err = run(["app", "--port", str(port)], capsys)
    assert code == 2
    assert f"port {port}" in one_line_error(err) and "in use" in err


# ---- bad data ----------------------------------------------------------------------------
def test_bad_data_exit_2_with_one_line_naming_the_problem(
    demo_csv: Path, tmp_path: Path, capsys: pytest.CaptureFixture, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(serve, "serve", lambda *a, **k: pytest.fail("server started"))
    not_a_log = tmp_path / "notes.json"
    not_a_log.write_text('{"notes": []}')
    code, _, err = run(["app", str(demo_csv), *DEMO_ARGS, "--log", str(not_a_log)], capsys)
    assert code == 2 and "notes.json" in one_line_error(err)
    garbage = tmp_path / "fills.xlsx"
    garbage.write_text("this is not a workbook")
    empty = tmp_path / "empty.csv"
    empty.write_text("")
    cases = [
        (tmp_path / "missing.csv", ["--value", "net_g"], "missing.csv"),
        (garbage, ["--value", "net_g"], "fills.xlsx"),
        (empty, ["--value", "net_g"], "empty.csv"),
        (tmp_path, ["--value", "net_g"], "folder"),
        (demo_csv, ["--value", "weight_g"], "weight_g"),
        (demo_csv, ["--value", "net_g", "--factors", "crew", "head"], "head"),
        (demo_csv, ["--value", "net_g", "--lsl", "510", "--usl", "490"], "lsl"),
    ]
    for data, roles, named in cases:
        for command in (["report", str(data), "-o", str(tmp_path / "r.html")], ["app", str(data)]):
            code, out, err = run(command + roles, capsys)
            assert code == 2, (command, roles, err)
            assert named in one_line_error(err), (command, roles, err)
    assert not (tmp_path / "r.html").exists()


def test_a_log_the_page_would_refuse_stops_the_app_at_start(
    demo_csv: Path, tmp_path: Path, capsys: pytest.CaptureFixture, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Finding 7: --log is opened at start as each page opens it; a bad one is one line, exit 2."""
    from qcexplore.app.explorer import Explorer

    monkeypatch.chdir(tmp_path)
    started: list[serve.AppSettings] = []
    monkeypatch.setattr(serve, "serve", lambda study, settings, **k: started.append(settings))
    args = cli.build_parser().parse_args(["app", str(demo_csv), *DEMO_ARGS])
    study, _found = cli.load_study(str(demo_csv), cli.study_roles(args))
    good = Explorer(study).save(tmp_path / "good.json")
    saved = json.loads(good.read_text())

    def variant(name: str, change: Callable[[dict], None]) -> Path:
        content = json.loads(json.dumps(saved))
        change(content)
        (tmp_path / name).write_text(json.dumps(content))
        return tmp_path / name

    cases = {
        # the right fingerprint, a state these data cannot take: passed the old start check
        variant("column.json", lambda c: c["state"].update(value="weight_g")): "weight_g",
        variant(
            "sigma.json", lambda c: c["state"].update(options={"chart": {"sigma_level": "three"}})
        ): "sigma",  # fmt: skip
        variant("other.json", lambda c: c.update(fingerprint="0" * 16)): "other data",
    }
    pipe = tmp_path / "pipe.json"
    os.mkfifo(pipe)
    cases[pipe] = "not a regular file"
    for log, named in cases.items():
        code, _, err = run(["app", str(demo_csv), *DEMO_ARGS, "--log", str(log)], capsys)
        # (What was found in the data file may be said before: the problem is one line.)
        assert code == 2 and "Traceback" not in err, (log, err)
        assert named in err.strip().splitlines()[-1], (log, err)
    assert started == []
    code, _, err = run(["app", str(demo_csv), *DEMO_ARGS, "--log", str(good)], capsys)
    assert code == 0, err
    (settings,) = started
    assert settings.log == str(good.resolve())
    assert Path(settings.log_folder) == (tmp_path / "qcexplore-logs").resolve()


def test_unexpected_error_exits_1_with_traceback(
    demo_csv: Path, capsys: pytest.CaptureFixture, monkeypatch: pytest.MonkeyPatch
) -> None:
    def broken(*args: object, **kwargs: object) -> None:
        raise RuntimeError("a bug")

    monkeypatch.setattr(Study, "report", broken)
    code, _, err = run(["report", str(demo_csv), "-o", "r.html", "--value", "net_g"], capsys)
    assert code == 1
    assert "Traceback" in err and "RuntimeError: a bug" in err


def test_progress_is_shown_on_stderr_while_a_large_file_loads(
    demo_csv: Path, capsys: pytest.CaptureFixture, monkeypatch: pytest.MonkeyPatch
) -> None:
    # qcexplore.data.io.read calls progress only for files over 20 MB; stand in for one.
    from qcexplore.data import io

    real = io.read

    def large(path: str, *, sheet: object = None, progress: object = None) -> pd.DataFrame:
        for fraction in (0.25, 0.5, 0.75, 1.0):
            progress(fraction)
        return real(path, sheet=sheet)

    monkeypatch.setattr(io, "read", large)
    study, _found = cli.load_study(str(demo_csv), {"value": "net_g"})
    assert study.value == "net_g"
    err = capsys.readouterr().err
    assert [line for line in err.splitlines() if line] == [
        f"reading demo.csv: {p:3d}%" for p in (20, 50, 70, 100)
    ]


# ---- demo and report ------------------------------------------------------------------------
@pytest.mark.parametrize("name", ["demo.csv", "demo.tsv", "demo.parquet"])
def test_demo_writes_the_demo_data(
    name: str, tmp_path: Path, capsys: pytest.CaptureFixture
) -> None:
    path = tmp_path / name
    code, out, _ = run(["demo", "-o", str(path), "--seed", "3", "--days", "2"], capsys)
    assert code == 0 and "--value net_g" in out
    expected, _ = filling_line(seed=3, days=2)
    written = Study(path, value="net_g", subgroup="round", time="taken_at")
    assert written.data["net_g"].tolist() == expected["net_g"].tolist()
    assert list(written.data["crew"].astype(str)) == list(expected["crew"])


def test_demo_then_report(demo_csv: Path, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    out_file = tmp_path / "r.html"
    code, out, err = run(["report", str(demo_csv), "-o", str(out_file), *DEMO_ARGS], capsys)
    assert code == 0, err
    assert out_file.exists() and str(out_file) in out
    text = out_file.read_text(encoding="utf-8")
    assert "net_g" in text and "<html" in text.lower()


def test_report_passes_the_log_and_title(
    demo_csv: Path, tmp_path: Path, capsys: pytest.CaptureFixture, monkeypatch: pytest.MonkeyPatch
) -> None:
    calls: list[tuple] = []

    def report(study: Study, path: str, **options: object) -> Path:
        calls.append((study.roles(), path, options))
        return Path(path)

    monkeypatch.setattr(Study, "report", report)
    log, out_file = tmp_path / "investigation-log.json", tmp_path / "r.html"
    shifts = "early=06:00,late=14:00,night=22:00"
    args = ["report", str(demo_csv), "-o", str(out_file), *DEMO_ARGS, "--shifts", shifts,
            "--log", str(log), "--title", "Line 3"]  # fmt: skip
    code, _, err = run(args, capsys)
    assert code == 0, err
    ((roles, path, options),) = calls
    assert path == str(out_file) and options == {"log": str(log), "title": "Line 3"}
    assert roles["shifts"] == {"early": "06:00", "late": "14:00", "night": "22:00"}
    assert roles["spec"] == {"lsl": 500.0, "usl": None, "target": None}


# ---- the served app ----------------------------------------------------------------------------
def test_app_folder_round_trip(tmp_path: Path) -> None:
    study = Study(filling_line(days=2)[0], **serve.DEMO_ROLES)
    settings = serve.AppSettings(title="fills.csv", log=None, log_folder=str(tmp_path / "logs"))
    config = serve.write_app_folder(study, tmp_path, settings)
    back, settings_back = serve.load_app_study(config)
    assert settings_back == settings
    assert back.roles() == study.roles()
    pd.testing.assert_frame_equal(back.data, study.data)
    assert (tmp_path / serve.NOTEBOOK).read_text().count("app_view()") == 1


def test_voila_config_culls_kernels_and_reads_no_config_files() -> None:
    from qcexplore.app.server import voila_config

    config = voila_config(host="127.0.0.1", port=8123, root=Path("/x"), token="t" * 20,
                          idle_timeout=300, connect_timeout=120)  # fmt: skip
    assert config.MappingKernelManager.cull_idle_timeout == 300
    assert config.MappingKernelManager.cull_interval == 10  # well inside the two minutes
    assert config.PageKernelManager.connect_timeout == 120.0
    assert config.Voila.token == "t" * 20 and config.Voila.ip == "127.0.0.1"
    assert config.Voila.config_file_paths == [] and config.VoilaConfiguration.file_allowlist == []
    assert config.VoilaConfiguration.preheat_kernel is False  # no /voila/query endpoint
    # The defaults of the command line: a page's kernel that never connected goes in 2 minutes.
    args = cli.build_parser().parse_args(["app"])
    assert (args.connect_timeout, args.idle_timeout) == (120.0, 900.0)


def test_python_dash_m_runs_the_command_line(tmp_path: Path) -> None:
    done = subprocess.run(
        [sys.executable, "-m", "qcexplore", "demo", "-o", str(tmp_path / "d.csv"), "--days", "1"],
        capture_output=True, text=True, env=environment(tmp_path), timeout=120,
    )  # fmt: skip
    assert done.returncode == 0, done.stderr
    done = subprocess.run(
        [sys.executable, "-m", "qcexplore", "report", str(tmp_path / "nope.csv"), "-o", "r.html",
         "--value", "net_g"],
        capture_output=True, text=True, env=environment(tmp_path), timeout=120,
    )  # fmt: skip
    assert done.returncode == 2
    assert (
        one_line_error(done.stderr)
        == "qcexplore: File " + repr(str(tmp_path / "nope.csv")) + " not found: check the path."
    )
