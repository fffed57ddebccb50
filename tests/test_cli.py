"""The command line: exit codes, one-line errors, the token rule of the served app, the demo
and report commands, and the app folder handed to the served notebook. No browser here
(tests/test_browser.py drives the page)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
import urllib.error
import urllib.request
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
    assert "--token" in out and "--measured-by" in out and "--shifts" in out


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
        (["app", "--host", "0.0.0.0"], "--token"),
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


def test_network_host_without_token_is_refused_before_anything_starts(
    capsys: pytest.CaptureFixture, monkeypatch: pytest.MonkeyPatch
) -> None:
    real_serve = serve.serve
    monkeypatch.setattr(serve, "serve", lambda *a, **k: pytest.fail("server started"))
    code, _, err = run(["app", "--host", "0.0.0.0"], capsys)
    assert code == 2
    assert "0.0.0.0" in one_line_error(err) and "--token" in err
    with pytest.raises(cli.QCDataError, match="token"):
        real_serve(Study(filling_line(days=1)[0], value="net_g"), host="0.0.0.0")


def test_busy_port_exits_2_before_serving(
    capsys: pytest.CaptureFixture, monkeypatch: pytest.MonkeyPatch
) -> None:
    import socket

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
    study = cli.load_study(str(demo_csv), {"value": "net_g"})
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
    settings = serve.AppSettings(title="fills.csv", workdir=str(tmp_path), log=None)
    config = serve.write_app_folder(study, tmp_path, settings)
    back, settings_back = serve.load_app_study(config)
    assert settings_back == settings
    assert back.roles() == study.roles()
    pd.testing.assert_frame_equal(back.data, study.data)
    assert (tmp_path / serve.NOTEBOOK).read_text().count("app_view()") == 1


def test_voila_arguments_cull_idle_kernels_and_preheat() -> None:
    args = serve.voila_arguments(
        Path("/x/app.ipynb"), host="127.0.0.1", port=8123, token="t", idle_timeout=300,
        preheat=True,
    )  # fmt: skip
    assert "--MappingKernelManager.cull_idle_timeout=300" in args
    assert any(a.startswith("--MappingKernelManager.cull_interval=") for a in args)
    assert {"--preheat_kernel=True", "--pool_size=1", "--token=t", "--port=8123"} <= set(args)
    assert "--Voila.ip=127.0.0.1" in args


def _status(url: str) -> tuple[int, str]:
    class NoRedirect(urllib.request.HTTPRedirectHandler):
        def redirect_request(self, *args: object, **kwargs: object) -> None:
            return None

    try:
        with urllib.request.build_opener(NoRedirect).open(url, timeout=60) as response:
            return response.status, response.read().decode("utf-8", "replace")
    except urllib.error.HTTPError as error:
        return error.code, error.headers.get("Location") or ""


def kernels_of(pid: int) -> int:
    """How many kernel processes the server ``pid`` runs (Linux /proc)."""
    count = 0
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            fields = stat.read_text().rsplit(")", 1)[1].split()
            command = (stat.parent / "cmdline").read_bytes()
        except OSError:  # the process ended meanwhile
            continue
        count += int(fields[1]) == pid and b"ipykernel" in command
    return count


def wait_until(condition: Callable[[], bool], seconds: float, what: str) -> None:
    deadline = time.monotonic() + seconds
    while not condition():
        if time.monotonic() > deadline:
            pytest.fail(f"{what} within {seconds:g} s")
        time.sleep(0.2)


def test_token_guards_the_app_idle_kernels_go_and_ctrl_c_stops_it(tmp_path: Path) -> None:
    token = "test-token-7f3a"
    process, address = harness.launch(
        ["--token", token, "--idle-timeout", "2"], env=environment(tmp_path)
    )
    try:
        assert address.endswith(f"/?token={token}")
        base = address.split("?")[0]
        for path in ("", "api/kernels/0"):  # the page and the kernel API, without the token
            status, where = _status(base + path)
            assert status == 403 or (status == 302 and "/login" in where), (path, status, where)
        wait_until(lambda: kernels_of(process.pid) == 1, 60, "the warm kernel did not start")
        status, page = _status(address)
        assert status == 200 and "voila" in page.lower()
        # The page took the warm kernel and a new one is warmed; the page's kernel, with no
        # browser connected to it, is shut down once idle for 2 s.
        wait_until(lambda: kernels_of(process.pid) == 2, 60, "no new warm kernel")
        wait_until(lambda: kernels_of(process.pid) == 1, 30, "the idle kernel was not culled")
        # Ctrl-C (SIGINT to the server) shuts the kernels down and exits 0.
        process.send_signal(signal.SIGINT)
        assert process.wait(60) == 0

        def group_gone() -> bool:
            try:
                os.killpg(process.pid, 0)
            except ProcessLookupError:
                return True
            return False

        wait_until(group_gone, 20, "kernels of the stopped app are still running")
    finally:
        harness.stop(process)


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
