"""The investigation log of the served app: no server paths from the page, the log folder
(sanitised names, no overwrite without a go-ahead, regular files only, a size cap), atomic
saves under a full disk, crafted logs, logs of changed data, failed loads, unsaved changes,
per-viewer autosave, and the whole round trip in a real browser (upload, download, autosave).

The numbered findings are those of issue 14; each test names the one it covers.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import threading
from collections.abc import Iterator
from datetime import datetime
from functools import cache
from pathlib import Path
from typing import Any

import harness
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from qcexplore import views
from qcexplore.app.explorer import Explorer
from qcexplore.app.logfolder import AUTOSAVE_PREFIX, LogExists, LogFolder, sanitise_name
from qcexplore.demo import ROLES, filling_line
from qcexplore.errors import QCDataError
from qcexplore.investigation import Investigation
from qcexplore.investigation_file import (
    LOG_FORMAT,
    LOG_SIZE_LIMIT,
    DataSummary,
    LogMismatch,
    log_content,
    parse_log,
    read_log_file,
    save_log,
)
from qcexplore.study import Study

REPO = Path(__file__).resolve().parents[1]
DAYS = 3


@cache
def frame() -> Any:
    return filling_line(days=DAYS)[0]


def study(**changes: Any) -> Study:
    return Study(frame(), **{**ROLES, **changes})


def explorer(data: Study | None = None, folder: Path | None = None) -> Explorer:
    """An explorer showing its chart (the cheapest view), with a log folder if given."""
    ex = Explorer(data or study())
    ex.show_view("chart")
    if folder is not None:
        ex.logbook.attach(LogFolder(folder))
    return ex


def labels(ex: Explorer, count: int) -> list[str]:
    return [str(x) for x in ex.chart().points["subgroup"].iloc[:count]]


def worked(ex: Explorer) -> Explorer:
    """Some work on show: a split, two exclusions and a note."""
    ex.set(by="crew")
    ex._select(tuple(labels(ex, 2)))
    ex.actions.reason.value = "jar knocked off the scale"
    ex.exclude_selected()
    ex.add_note("Crew B reads high on its own scale.")
    return ex


def upload(ex: Explorer, content: bytes, name: str = "log.json") -> None:
    """What the browser's file upload hands the kernel."""
    ex.actions.upload.value = (
        {"name": name, "type": "application/json", "size": len(content),
         "content": memoryview(content), "last_modified": datetime.now()},
    )  # fmt: skip


def seen(ex: Explorer) -> tuple:
    """Everything of the state a person sees: the state, the role controls, notes, exclusions."""
    return (ex.state, ex.roles.read(), ex.actions.notes.value, ex.actions.exclusions.value)


# ---- finding 1: no server paths from the page ----------------------------------------------------
@settings(max_examples=200)
@given(st.text(max_size=120))
def test_any_typed_name_stays_a_plain_name_in_the_folder(text: str) -> None:
    try:
        name = sanitise_name(text)
    except QCDataError:
        return
    assert name.endswith(".json") and not name.startswith(".") and len(name) <= 85
    assert not set(name) & set("/\\:\0\n") and ".." not in name.removesuffix(".json")
    root = Path(tempfile.gettempdir()) / "qcx-folder"
    assert (root / name).parent == root


def test_the_page_names_no_path_and_the_folder_keeps_to_itself(tmp_path: Path) -> None:
    ex = explorer(folder=tmp_path / "logs")
    assert not hasattr(ex.actions, "path")  # the old free-text path box is gone
    outside = tmp_path / "secret.json"
    original = log_content(ex.state, ex.logbook.data)
    outside.write_bytes(original)
    folder = ex.logbook.folder
    for typed in ("../secret", "../../secret.json", "/etc/passwd", str(outside)):
        ex.actions.log_name.value = typed
        ex.actions.save.click()
        written = folder.path_of(typed)
        assert written.parent == folder.root and written.exists(), typed
    assert outside.read_bytes() == original  # the file outside the folder is untouched
    with pytest.raises(QCDataError, match="no investigation log"):
        folder.read("../../secret-missing")  # looked up in the folder only
    assert sorted(folder.names()) == sorted(
        {folder.path_of(t).name for t in ("../secret", "/etc/passwd", str(outside))}
    )


def test_the_folder_replaces_a_log_only_when_told(tmp_path: Path) -> None:
    folder = LogFolder(tmp_path)
    first = log_content(Investigation(value="net_g"), DataSummary("a"))
    second = log_content(Investigation(value="net_g").note("later"), DataSummary("a"))
    folder.write("week 12", first)
    with pytest.raises(LogExists):
        folder.write("week 12.json", second)
    assert folder.read("week 12") == first
    folder.write("week 12", second, replace=True)
    assert folder.read("week 12") == second and folder.names() == ["week 12.json"]
    # From the page: the person is asked, and nothing is replaced on a cancel.
    ex = worked(explorer(folder=tmp_path))
    ex.actions.log_name.value = "week 12"
    ex.actions.save.click()
    assert "Replace it?" in ex.actions.confirm_text.value
    ex.actions.cancel.click()
    assert folder.read("week 12") == second and "Nothing was changed" in ex.actions.log_status.value
    ex.actions.save.click()
    ex.actions.confirm.click()
    assert parse_log(folder.read("week 12"), "w").state_data["notes"][0]["text"].startswith("Crew")


def test_only_regular_files_of_a_capped_size_are_read(tmp_path: Path) -> None:
    folder = LogFolder(tmp_path / "logs")
    good = log_content(Investigation(value="net_g"), DataSummary("a"))
    (tmp_path / "outside.json").write_bytes(good)
    os.symlink(tmp_path / "outside.json", folder.root / "link.json")
    os.symlink("/dev/zero", folder.root / "zero.json")
    os.mkfifo(folder.root / "pipe.json")
    (folder.root / "folder.json").mkdir()
    (folder.root / ".hidden.json").write_bytes(good)
    with open(folder.root / "huge.json", "wb") as huge:
        huge.truncate(LOG_SIZE_LIMIT + 1)  # sparse: no disk used
    assert folder.names() == ["huge.json"]  # links, pipes, folders and hidden names not listed
    refused = {}

    def read_all() -> None:
        for name in ("link", "zero", "pipe", "folder", "huge"):
            with pytest.raises(QCDataError) as error:
                folder.read(name)
            refused[name] = str(error.value)

    reader = threading.Thread(target=read_all, daemon=True)
    reader.start()
    reader.join(30)
    assert not reader.is_alive(), "reading a named pipe or a device waited"
    assert "huge.json" in refused["huge"] and "4.0 MB" in refused["huge"]
    assert all("regular file" in refused[n] or "open" in refused[n] for n in ("zero", "pipe"))
    assert set(refused) == {"link", "zero", "pipe", "folder", "huge"}
    for path in ("/dev/zero", folder.root / "pipe.json", folder.root):  # also for Python's API
        with pytest.raises(QCDataError, match="regular file"):
            read_log_file(path)


# ---- finding 8: atomic saves ---------------------------------------------------------------------
FULL_DISK = """
import resource, sys
from pathlib import Path
from qcexplore.investigation import Investigation
from qcexplore.investigation_file import DataSummary, save_log
from qcexplore.app.logfolder import LogFolder
from qcexplore.errors import QCDataError
state = Investigation(value="net_g")
for i in range(400):
    state = state.note("a long note " * 40 + str(i))
limit = int(sys.argv[2])
resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))  # a disk with room for `limit` bytes
try:
    save_log(sys.argv[1], state, DataSummary("abc"))
except QCDataError as error:
    print("refused:", error)
try:
    LogFolder(Path(sys.argv[1]).parent).write("good.json", b"x" * (2 * limit), replace=True)
except QCDataError as error:
    print("refused:", error)
"""


def test_a_save_on_a_full_disk_leaves_the_good_log_as_it_was(tmp_path: Path) -> None:
    good = save_log(tmp_path / "good.json", Investigation(value="net_g").note("kept"),
                    DataSummary("abc"))  # fmt: skip
    before = good.read_bytes()
    limit = 64 * 1024
    env = {**os.environ, "PYTHONPATH": str(REPO), "PYTHONDONTWRITEBYTECODE": "1"}
    done = subprocess.run([sys.executable, "-c", FULL_DISK, str(good), str(limit)], env=env,
                          capture_output=True, text=True, timeout=120)  # fmt: skip
    assert done.returncode == 0, done.stderr
    refusals = [line for line in done.stdout.splitlines() if line.startswith("refused:")]
    assert len(refusals) == 2 and all("as it was" in line for line in refusals), done.stdout
    assert "File too large" in refusals[0]
    assert good.read_bytes() == before  # the old log, whole
    assert parse_log(good.read_bytes(), "good.json").state(views.option_types()).notes[0].text
    assert sorted(p.name for p in tmp_path.iterdir()) == ["good.json"]  # no temporary left


# ---- crafted logs: only QCDataError escapes ------------------------------------------------------
json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=20),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner,
                                                                max_size=4),
    max_leaves=20,
)  # fmt: skip
STATE_FIELDS = ("value", "subgroup", "time", "start", "end", "options", "choices", "view",
                "exclusions", "notes")  # fmt: skip


@cache
def base() -> tuple[Explorer, dict]:
    """An explorer with work on show, and the payload of its saved log."""
    ex = worked(explorer())
    return ex, json.loads(log_content(ex.state, ex.logbook.data))


def crafted_states() -> st.SearchStrategy[dict]:
    """A saved state with some fields (or their parts) replaced by any JSON."""
    _, payload = base()
    state = payload["state"]
    parts = st.fixed_dictionaries(
        {},
        optional={
            **{name: json_values for name in STATE_FIELDS},
            "options": st.dictionaries(st.sampled_from([v.name for v in views.VIEWS]),
                                       st.dictionaries(st.text(max_size=12), json_values,
                                                       max_size=3), max_size=2),
            "exclusions": st.lists(st.fixed_dictionaries({"subgroup": json_values,
                                                          "reason": json_values}), max_size=3),
            "value": st.sampled_from(["net_g", "crew", "taken_at", "gross_g", "round", ""]),
            "start": st.sampled_from(["2024-01-02", "yesterday", "2024-13-40", None]),
        },
    )  # fmt: skip
    return parts.map(lambda changes: {**state, **changes})


@settings(max_examples=300, suppress_health_check=[HealthCheck.too_slow])
@given(
    st.one_of(
        st.binary(max_size=300),
        json_values.map(lambda v: json.dumps(v).encode()),
        st.fixed_dictionaries({"format": st.just(LOG_FORMAT), "version": json_values | st.just(3),
                               "fingerprint": json_values, "roles": json_values,
                               "data": json_values, "state": json_values})
        .map(lambda v: json.dumps(v).encode()),
    )
)  # fmt: skip
def test_a_crafted_file_is_refused_with_a_qcdataerror(content: bytes) -> None:
    try:
        log = parse_log(content, "crafted.json")
        state = log.state(views.option_types())
    except QCDataError:
        return
    hash(state)  # a state that passes is as sound as one the controls make


@pytest.mark.parametrize(
    "content",
    [
        b"[" * 200_000,
        b'{"a":' * 100_000,
        b'{"format": "qcexplore investigation log", "version": ' + b"9" * 10_000 + b"}",
        bytes(range(256)) * 100,
        "\ufeff{}".encode("utf-16"),
    ],
    ids=["deep-list", "deep-table", "huge-number", "binary", "utf-16"],
)
def test_nested_huge_and_binary_files_are_refused(content: bytes) -> None:
    with pytest.raises(QCDataError, match="not a qcexplore investigation log|not JSON"):
        parse_log(content, "crafted.json")


@settings(max_examples=60, suppress_health_check=[HealthCheck.too_slow])
@given(crafted_states())
def test_a_crafted_state_with_the_right_fingerprint_changes_nothing_or_loads(state: dict) -> None:
    """Finding 10 under crafted input: a refused load leaves everything on show as it was."""
    ex, payload = base()
    ex.load(Investigation.from_dict(payload["state"], views.option_types()))
    before = seen(ex)
    content = json.dumps({**payload, "state": state}, default=str).encode()
    try:
        ex.load(content)
    except QCDataError:
        assert seen(ex) == before
        return
    loaded = Investigation.from_dict(state, views.option_types())
    assert ex.state == loaded and hash(ex.state) is not None


# ---- finding 10: a failed load changes nothing ---------------------------------------------------
def test_a_failed_load_keeps_the_work_on_show(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    ex = worked(explorer(folder=tmp_path))
    before = seen(ex)
    payload = json.loads(log_content(ex.state, ex.logbook.data))
    bad = {
        "column": {**payload, "state": {**payload["state"], "value": "weight_g"}},
        "sigma": {**payload, "state": {**payload["state"],
                                       "options": {"chart": {"sigma_level": -1}}}},
        "notes": {**payload, "state": {**payload["state"], "notes": [{"text": 3}]}},
    }  # fmt: skip
    for name, content in bad.items():
        with pytest.raises(QCDataError):
            ex.load(json.dumps(content).encode())
        assert seen(ex) == before, name
        upload(ex, json.dumps(content).encode(), f"{name}.json")  # from the page: reported
        if ex.actions.confirm_box.layout.display != "none":  # a sound file: asked first
            assert "replaces what is on show now" in ex.actions.confirm_text.value
            ex.actions.confirm.click()
        assert "Nothing was changed" in ex.actions.log_status.value
        assert seen(ex) == before, name
    # A log the view on show cannot draw is refused before anything changes.
    other = Investigation(value="net_g", subgroup="round", time="taken_at").note("other")

    def broken(self: Any, *args: Any, **kwargs: Any) -> Any:
        raise RuntimeError("cannot draw")

    monkeypatch.setattr(type(views.view_named("chart")), "compute", broken)
    with pytest.raises(QCDataError, match="cannot draw"):
        ex.load(other)
    assert seen(ex) == before


# ---- finding 11: logs of changed data ------------------------------------------------------------
def test_a_log_of_changed_data_says_what_differs_and_applies_what_fits(tmp_path: Path) -> None:
    then = explorer(Study(frame().iloc[:-1], **ROLES))  # one row fewer than now
    worked(then)
    log = then.save(tmp_path / "log.json")
    changes = {
        "one appended row": (study(), ["1 row added at the end"]),
        "units": (study(units="kg"), ["units then g; now kg"]),
        "a spec": (study(spec={"lsl": 499}), ["spec then lsl 500; now lsl 499"]),
        "factor order": (study(factors=["nozzle", "crew", "shift"]),
                         ["factors then crew, shift, nozzle; now nozzle, crew, shift"]),
    }  # fmt: skip
    for what, (data, expected) in changes.items():
        ex = explorer(data)
        with pytest.raises(LogMismatch) as refused:
            ex.load(log)
        differences = refused.value.differences
        assert all(any(e in d for d in differences) for e in expected), (what, differences)
        ex.load(log, fit=True)
        assert ex.state.notes == then.state.notes, what
        assert ex.state.exclusions == then.state.exclusions, what  # the subgroups are there
        assert ex.options("chart").by == "crew", what
        assert "Applied what fits these data" in ex.status.value
    # Other data: what they lack is left out and said; the notes are kept.
    shorter = explorer(Study(frame().iloc[: len(frame()) // 2], **ROLES))
    late = Investigation(value="net_g", subgroup="round", time="taken_at").exclude(
        [labels(then, 1)[0], "no such subgroup"], "checked"
    ).note("kept")  # fmt: skip
    content = log_content(late, then.logbook.data)
    shorter.load(content, fit=True)
    assert shorter.state.notes[0].text == "kept" and len(shorter.state.exclusions) == 1
    assert "1 exclusion of subgroups these data do not have" in shorter.status.value
    # From the page: the differences are shown, and applying is the person's choice.
    ex = explorer(study(units="kg"), folder=tmp_path / "logs")
    upload(ex, log.read_bytes(), "log.json")
    assert "units then g; now kg" in ex.actions.confirm_text.value
    assert ex.actions.confirm.description == "Apply what still fits"
    ex.actions.confirm.click()
    assert ex.state.notes == then.state.notes


# ---- finding 12 and 9: unsaved changes, per-viewer autosave --------------------------------------
def test_unsaved_changes_are_asked_about_before_a_load_or_a_start_over(tmp_path: Path) -> None:
    saved = worked(explorer()).save(tmp_path / "saved.json")
    ex = explorer(folder=tmp_path / "logs")
    assert "qcx-unsaved" not in ex.actions.log_status.value
    ex.add_note("not saved yet")
    assert "qcx-unsaved" in ex.actions.log_status.value  # the page warns before a reload
    work = ex.state
    for act in (lambda: upload(ex, saved.read_bytes(), "saved.json"), ex.actions.start_over.click):
        act()
        question = ex.actions.confirm_text.value
        assert "replaces what is on show now" in question and "1 note" in question
        assert "autosave" in question
        ex.actions.cancel.click()
        assert ex.state == work
    upload(ex, saved.read_bytes(), "saved.json")
    ex.actions.confirm.click()
    assert ex.state.notes[0].text.startswith("Crew B")
    assert "qcx-unsaved" not in ex.actions.log_status.value  # as opened: nothing unsaved
    ex.actions.start_over.click()  # nothing unsaved: no question
    assert ex.state.notes == () and ex.state.exclusions == ()
    from qcexplore.app.serve import UNSAVED_WARNING

    assert ".qcx-unsaved" in UNSAVED_WARNING and "beforeunload" in UNSAVED_WARNING


def test_each_page_view_autosaves_to_its_own_file(tmp_path: Path) -> None:
    folder = tmp_path / "logs"
    first, second = explorer(folder=folder), explorer(folder=folder)
    assert LogFolder(folder).names() == []  # nothing is written before anything changed
    first.add_note("from the first page")
    second.add_note("from the second page")
    names = LogFolder(folder).names()
    assert sorted(names) == sorted([first.logbook.autosave, second.logbook.autosave])
    assert all(n.startswith(AUTOSAVE_PREFIX) for n in names)
    first.add_note("and more")
    kept = parse_log(LogFolder(folder).read(first.logbook.autosave), "a")
    assert [n["text"] for n in kept.state_data["notes"]] == ["from the first page", "and more"]
    # The page is reloaded (a new kernel): the last page's work is opened from the folder.
    reloaded = explorer(folder=folder)
    reloaded.actions.saved_logs.value = first.logbook.autosave
    reloaded.actions.open.click()
    assert reloaded.state.notes == first.state.notes


# ---- a real browser: upload, download and autosave -----------------------------------------------
CHROMIUM = Path("/usr/bin/chromium")
WAIT_MS = 90_000


@pytest.fixture(scope="module")
def served(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[str, Path]]:
    home = tmp_path_factory.mktemp("app-log-home")
    folder = home / "logs"
    env = harness.private_environment(home, python_path=[REPO])
    data = home / "fills.csv"
    frame().to_csv(data, index=False)
    roles = [
        "--value",
        "net_g",
        "--subgroup",
        "round",
        "--time",
        "taken_at",
        "--factors",
        "crew",
        "shift",
        "nozzle",
        "--measured-by",
        "crew",
        "--lsl",
        "500",
        "--units",
        "g",
    ]
    process, address = harness.launch([str(data), *roles, "--log-folder", str(folder)], env=env)
    try:
        yield address, folder
    finally:
        harness.stop(process)


@pytest.mark.browser
def test_upload_download_and_autosave_in_the_browser(served: tuple[str, Path]) -> None:
    from playwright.sync_api import sync_playwright

    address, folder = served
    assert CHROMIUM.exists(), "apt-get install -y chromium"
    requests: list[str] = []
    dialogs: list[str] = []
    with sync_playwright() as driver:
        browser = driver.chromium.launch(executable_path=str(CHROMIUM), args=["--no-sandbox"])
        try:
            page = browser.new_page(viewport={"width": 1400, "height": 1000}, accept_downloads=True)
            page.on("request", lambda request: requests.append(request.url))
            page.on("dialog", lambda dialog: (dialogs.append(dialog.type), dialog.accept()))
            page.goto(address, timeout=WAIT_MS)
            note = page.locator(".qcx-note textarea")
            note.wait_for(timeout=WAIT_MS)
            # Autosave: a note is on the server, in this page's own file, within seconds.
            note.fill("browser: crew B's scale reads high")
            page.locator("button.qcx-add-note").click()
            page.locator(".qcx-autosaved").wait_for(timeout=WAIT_MS)
            (autosave,) = harness.wait_until(lambda: LogFolder(folder).names(), 30, "no autosave")
            saved = parse_log(LogFolder(folder).read(autosave), autosave).state_data["notes"]
            assert [n["text"] for n in saved] == ["browser: crew B's scale reads high"]
            assert page.locator(".qcx-unsaved").count() == 1
            # Download: the log comes from the page, not from a server file.
            with page.expect_download() as download:
                page.locator("a.qcx-log-download-link").click()
            downloaded = Path(download.value.path()).read_bytes()
            log = parse_log(downloaded, download.value.suggested_filename)
            assert log.state_data["notes"] == saved and log.data.rows is not None
            # A reload with unsaved changes asks first; the new page (a new kernel) is empty.
            page.reload(timeout=WAIT_MS)
            assert dialogs == ["beforeunload"]
            note.wait_for(timeout=WAIT_MS)
            assert page.locator(".qcx-notes").inner_text().strip() == ""
            # Upload: the downloaded log brings the note back.
            with tempfile.TemporaryDirectory() as spare:
                path = Path(spare) / "investigation-log.json"
                path.write_bytes(downloaded)
                with page.expect_file_chooser() as chooser:  # the browser's own file dialog
                    page.locator("button.qcx-log-upload").click()
                chooser.value.set_files(str(path))
                page.locator(".qcx-notes").get_by_text("crew B's scale").wait_for(timeout=WAIT_MS)
            # The autosave of the first page is in the list and opens too.
            page.select_option(".qcx-log-saved select", label=autosave)
            page.locator("button.qcx-log-open").click()
            page.locator(".qcx-log-status").get_by_text(f"Opened {autosave}").wait_for(
                timeout=WAIT_MS
            )
            assert page.locator(".qcx-notes").get_by_text("crew B's scale").count() == 1
        finally:
            browser.close()
    local = address.rstrip("/")
    outside = [u for u in requests if not u.startswith((local, "data:", "blob:"))]
    assert outside == []  # finding 6: the page asked nothing of any other server
    assert len(LogFolder(folder).names()) == 2  # each page view autosaves to its own file
