"""Reading the board as a charge nurse would, in Debian's Chromium through Playwright
(never a downloaded browser), against the real app served by uvicorn, on a six-bed unit
written straight into storage (``hospital.seed_unit``).

Checks, each against something outside the board's code:
- at 1366 x 768 (a common ward workstation screen; common practice, no source) every
  open flag of the six patients is inside the first screen, measured by Chromium's
  layout;
- an SpO2 estimate is never in a measured-value cell (the DOM says which cells hold
  measurements) and is labelled as an estimate;
- an unknown unit or patient answers 404 and says "unknown", never "no flags";
- axe-core (the npm package, injected from tests/browser/node_modules, never fetched)
  reports no serious or critical violation on the index, unit and patient pages;
- one acknowledgement a patient, through the pipeline's acknowledge path, the page
  saying whose flags, and the name remembered for the next form.
Screenshots go to test-artifacts/ for a person to look at.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any
from urllib.parse import quote

import pytest

from monitor.config import validate_config
from monitor.service import build_service
from tests.browser.hospital import UNIT, Seeded, seed_unit
from tests.conftest import service_missing
from tests.integration.service import REPO, free_port

pytestmark = pytest.mark.browser

CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]
AXE = Path(__file__).resolve().parent / "node_modules" / "axe-core" / "axe.min.js"
ARTIFACTS = REPO / "test-artifacts"
BOARD_CODE = "board-code-for-reading-tests"


@dataclass
class Board:
    base: str
    seeded: Seeded
    service: Any


class _Silent:
    alias = "log"

    def send(self, notification: object) -> object:
        from adapters.notify import DeliveryResult

        return DeliveryResult.delivered()

    def close(self) -> None:
        return None


@pytest.fixture(scope="module")
def board(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Board]:
    if not CHROMIUM.exists():
        service_missing("Chromium", f"{CHROMIUM} not installed (apt-get install chromium)")
    import uvicorn

    tmp = tmp_path_factory.mktemp("reading")
    mp = pytest.MonkeyPatch()
    mp.setenv("GASGAP_T_BOARD_CODE", BOARD_CODE)
    config = validate_config(
        {
            "site": {
                "name": "Hollowmere General Hospital",
                "elevation_m": 1600,
                "timezone": "America/Denver",
                "display_key": "mrn",
            },
            "database": {"url": f"sqlite:///{tmp}/gasgap.db"},
            "http": {"board_token_env": "GASGAP_T_BOARD_CODE"},
        }
    )
    service = build_service(config, channels={"log": _Silent()})
    seeded = seed_unit(service.db, datetime.now(UTC))
    port = free_port()
    server = uvicorn.Server(
        uvicorn.Config(service.app, host="127.0.0.1", port=port, log_level="warning")
    )
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    deadline = time.monotonic() + 20
    while not server.started and time.monotonic() < deadline:
        time.sleep(0.05)
    assert server.started, "uvicorn did not start"
    try:
        yield Board(f"http://127.0.0.1:{port}", seeded, service)
    finally:
        server.should_exit = True
        thread.join(timeout=10)
        service.db.dispose()
        mp.undo()


@pytest.fixture(scope="module")
def browser(board: Board) -> Iterator[Any]:
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        launched = p.chromium.launch(
            executable_path=str(CHROMIUM), args=CHROMIUM_ARGS, headless=True
        )
        try:
            yield launched
        finally:
            launched.close()


def _page(
    browser: Any, board: Board, width: int = 1366, height: int = 768, *, bypass_csp: bool = False
) -> Any:
    # bypass_csp: only for injecting the test's own axe-core script into the page (the
    # board's content security policy rightly refuses inline scripts)
    page = browser.new_page(viewport={"width": width, "height": height}, bypass_csp=bypass_csp)
    page.goto(board.base + f"/board/unit/{UNIT}?token={BOARD_CODE}")
    return page


def _shot(page: Any, name: str, *, full: bool = False) -> None:
    ARTIFACTS.mkdir(exist_ok=True)
    page.screenshot(path=str(ARTIFACTS / name), full_page=full)


def _patient_url(board: Board, key: str) -> str:
    return board.base + "/board/patient/" + quote(key, safe="")


def test_every_open_flag_of_six_patients_is_on_the_first_screen(browser: Any, board: Board) -> None:
    page = _page(browser, board)
    _shot(page, "board-1366x768.png")
    assert page.locator("table.board tbody tr").count() == 6
    flags = page.locator("td.flags li.flag")
    assert flags.count() == board.seeded.open_flags
    for i in range(flags.count()):
        box = flags.nth(i).bounding_box()
        assert box is not None and box["y"] + box["height"] <= 768, (
            f"open flag {i} ends at {box}, below the first screen of 768 px"
        )
    buttons = page.locator("form.ack button")
    for i in range(buttons.count()):
        box = buttons.nth(i).bounding_box()
        assert box is not None and box["y"] + box["height"] <= 768
    width = page.evaluate("document.documentElement.scrollWidth")
    assert width <= 1366, f"the board scrolls sideways ({width}px)"
    page.close()


def test_rows_in_priority_order_with_words_and_closed_flags_folded(
    browser: Any, board: Board
) -> None:
    page = _page(browser, board)
    words = page.locator("td.prio-cell").all_inner_texts()
    order = ["High priority", "Medium priority", "Low priority", "No open flag"]
    ranks = [next(i for i, w in enumerate(order) if w in text) for text in words]
    assert ranks == sorted(ranks), words
    assert "aa-rise" not in page.inner_text("main")
    assert "oxygenation-band" not in page.inner_text("main")
    # The cleared flag of bed 6 is folded away and never reads as a priority.
    closed = page.locator("details.closed")
    assert closed.count() == 1 and not closed.first.evaluate("e => e.open")
    assert "priority" not in closed.first.inner_text().lower()
    tally = page.inner_text("p.tally")
    assert f"{board.seeded.open_flags} open flags" in tally, tally
    # Bed 4: PaO2 61 with no FiO2 is on the board and says why there is no P/F.
    bed4 = page.locator("tr", has_text="HM710004")
    assert "PaO2 61 mmHg" in bed4.inner_text() and "FiO2 not recorded" in bed4.inner_text()
    # Bed 5: a five-day-old gas says it is old, whatever the flag's raise time.
    bed5 = page.locator("tr", has_text="HM710005").inner_text()
    assert "5 d" in bed5 and "OLD RESULT" in bed5.upper()
    page.close()


def test_an_estimate_is_never_in_a_measured_cell_and_is_labelled(
    browser: Any, board: Board
) -> None:
    page = _page(browser, board)
    measured = page.locator("[data-kind=measured]").all_inner_texts()
    assert measured, "the board marks its measured cells"
    for text in measured:
        assert "S/F" not in text and "estimate" not in text.lower(), text
    estimates = page.locator("[data-kind=estimate]")
    assert estimates.count() == 1
    assert "S/F 176" in estimates.first.inner_text()  # 88 % / 0.50, worked by hand
    cell = page.locator("td.estimate", has=estimates.first)
    assert "estimate from spo2, not a blood gas" in cell.inner_text().lower()
    headline = page.locator("tr", has_text="HM710003").locator(".headline").inner_text()
    assert "176" not in headline

    page.goto(_patient_url(board, board.seeded.keys[2]))
    for text in page.locator("table.series tr[data-kind=measured]").all_inner_texts():
        assert "176" not in text
    rows = page.locator("table.estimate-table tr[data-kind=estimate]")
    assert rows.count() == 2
    assert "estimates from spo2" in page.inner_text("section.estimates h2").lower()
    assert page.locator("svg.plot .dot-sf").count() == 2
    _shot(page, "board-patient-estimates.png", full=True)
    page.close()


def test_unknown_unit_and_patient_answer_404(browser: Any, board: Board) -> None:
    page = _page(browser, board)
    for path, words in (
        ("/board/unit/Nowhere", "unknown unit"),
        ("/board/unit/icu-north", "unknown unit"),
        ("/board/patient/nobody-here", "unknown patient"),
    ):
        response = page.goto(board.base + path)
        assert response is not None and response.status == 404, path
        text = page.inner_text("main").lower()
        assert words in text and "no open flags" not in text
    assert "Did you mean ICU-North?" in page.goto(board.base + "/board/unit/icu-north").text()
    page.close()


def test_acknowledge_once_per_patient_and_the_name_is_remembered(
    browser: Any, board: Board
) -> None:
    page = _page(browser, board)
    row = page.locator("tr", has_text="HM710001")
    row.locator("input[name=by]").fill("Mara Quenby")
    row.locator("button", has_text="Acknowledge 2 flags").click()
    page.wait_for_load_state()
    note = page.inner_text("p.note")
    assert "Acknowledged 2 flags for HM710001" in note and "Mara Quenby" in note, note
    assert "acknowledged by Mara Quenby" in page.locator("tr", has_text="HM710001").inner_text()
    other = page.locator("tr", has_text="HM710006").locator("input[name=by]")
    assert other.input_value() == "Mara Quenby"
    with board.service.db.begin(read_only=True) as conn:
        from storage.alerts import open_alerts

        acked = [a for a in open_alerts(conn) if a.patient_key == board.seeded.keys[0]]
    assert [a.acknowledged_by for a in acked] == ["Mara Quenby", "Mara Quenby"]
    _shot(page, "board-after-ack.png")
    page.close()


def test_axe_finds_no_serious_or_critical_violation(browser: Any, board: Board) -> None:
    if not AXE.exists():
        service_missing(
            "axe-core", f"{AXE} missing (make tests/browser/node_modules/axe-core/axe.min.js)"
        )
    page = _page(browser, board, bypass_csp=True)
    found: dict[str, list[str]] = {}
    for path in (
        "/board",
        f"/board/unit/{UNIT}",
        "/board/patient/" + quote(board.seeded.keys[0], safe=""),
    ):
        page.goto(board.base + path)
        page.add_script_tag(path=str(AXE))
        result = page.evaluate("() => axe.run(document, {resultTypes: ['violations']})")
        bad = [
            f"{v['id']}: {v['help']} ({len(v['nodes'])} nodes)"
            for v in result["violations"]
            if v["impact"] in ("serious", "critical")
        ]
        if bad:
            found[path] = bad
    page.goto(board.base + "/board")
    _shot(page, "board-index.png")
    page.close()
    assert not found, found


def test_docs_and_board_load_nothing_from_elsewhere(browser: Any, board: Board) -> None:
    """A ward workstation may have no internet: every request the pages make stays on
    this server (Chromium's own record of the requests)."""
    page = _page(browser, board)
    hosts: set[str] = set()
    page.on("request", lambda r: hosts.add(r.url.split("/")[2]))
    for path in ("/docs", f"/board/unit/{UNIT}", "/board"):
        response = page.goto(board.base + path)
        assert response is not None and response.status == 200, path
    assert "/api/flags" in page.goto(board.base + "/docs").text()
    assert page.locator("script[src^=http]").count() == 0
    assert hosts == {board.base.split("/")[2]}, hosts
    page.close()
