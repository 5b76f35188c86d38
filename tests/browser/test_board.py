"""The unit board in a real headless Chromium (Debian's ``chromium``, driven by
Playwright for Python), against a real ``gasgap serve`` process.

Checks: the flagged patient is on the ICU-North page with the priority in words; the
advisory sentence is on the page; acknowledging through the form records the name
(read back through the API's audit trail); a display key that is an HTML payload shows
as text and runs nothing. A screenshot goes to test-artifacts/board.png for a person to
look at.
"""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest

from monitor.engine.model import ADVISORY
from tests.conftest import service_missing
from tests.integration.service import (
    API_TOKEN,
    BOARD_TOKEN,
    REPO,
    Running,
    ack_code,
    free_port,
    running_service,
    send_mllp,
    site_toml,
    wait_for,
    webhook_receiver,
)
from tests.integration.service.test_serve_process import hollowmere_gas

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
AUTH = {"Authorization": f"Bearer {API_TOKEN}"}
#: A patient identifier that is markup: it must be shown as these characters, and run nothing.
HOSTILE = '<img src=x onerror="window.gasgapPwned=1"><script>window.gasgapPwned=2</script>'
ARTIFACTS = REPO / "test-artifacts"


@pytest.fixture(scope="module")
def board(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Running]:
    if not CHROMIUM.exists() or shutil.which(str(CHROMIUM)) is None:
        service_missing("Chromium", f"{CHROMIUM} not installed (apt-get install chromium)")
    tmp = tmp_path_factory.mktemp("board")
    with webhook_receiver() as (url, _received):
        http_port, mllp_port = free_port(), free_port()
        config = tmp / "site.toml"
        config.write_text(
            site_toml(
                db_url=f"sqlite:///{tmp}/gasgap.db",
                http_port=http_port,
                mllp_port=mllp_port,
                webhook_url=url,
            )
        )
        with running_service(config, http_port, tmp / "service.log") as running:
            gases = [
                hollowmere_gas("HGH7001", "HM700101", "F-7001", bed="3", minutes_ago=240),
                hollowmere_gas("HGH7002", "HM700101", "F-7002", bed="3", pao2="58", minutes_ago=20),
                hollowmere_gas("HGH7003", HOSTILE, "F-7003", bed="5", pao2="48", minutes_ago=35),
            ]
            for gas in gases:
                assert ack_code(send_mllp(mllp_port, gas)) == "AA"
            assert wait_for(lambda: len(_flags(running)) >= 2), _flags(running)
            yield running
            assert running.stop() == 0


def _flags(running: Running) -> list[dict[str, object]]:
    return list(httpx.get(running.base + "/api/flags", headers=AUTH).json()["flags"])


def test_board_shows_flags_acknowledges_and_escapes(board: Running) -> None:
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        browser = p.chromium.launch(
            executable_path=str(CHROMIUM), args=CHROMIUM_ARGS, headless=True
        )
        try:
            page = browser.new_page(viewport={"width": 1280, "height": 900})
            # Without the board code the page asks for it.
            page.goto(board.base + "/board/unit/ICU-North")
            assert "/board/login" in page.url
            page.fill("#token", "wrong code")
            page.click("button[type=submit]")
            assert "not right" in page.inner_text("body")
            page.fill("#token", BOARD_TOKEN)
            page.click("button[type=submit]")
            page.wait_for_url("**/board/unit/ICU-North")

            text = page.inner_text("body")
            assert "HM700101" in text
            assert "Medium priority" in text or "High priority" in text
            assert " ".join(ADVISORY.split()) in " ".join(text.split())
            # The hostile identifier is shown as its characters and ran nothing.
            assert HOSTILE in page.text_content("main")
            assert page.evaluate("window.gasgapPwned") is None
            assert page.locator("main img").count() == 0
            assert page.locator("main script").count() == 0

            ARTIFACTS.mkdir(exist_ok=True)
            page.screenshot(path=str(ARTIFACTS / "board.png"), full_page=True)

            row = page.locator("tr", has_text="HM700101")
            row.locator("input[name=by]").fill("Mara Quenby")
            row.locator("button", has_text="Acknowledge").click()
            page.wait_for_url("**/board/unit/ICU-North?done=acknowledged*")
            assert "Acknowledged 1 flag for HM700101" in page.inner_text("body")
            assert "by Mara Quenby" in page.locator("tr", has_text="HM700101").inner_text()

            # The patient page of the hostile key: series, plot and audit trail, as text.
            page.locator("a.patient", has_text="<img").click()
            page.wait_for_load_state()
            assert HOSTILE in page.text_content("h1")
            assert page.evaluate("window.gasgapPwned") is None
            assert page.locator("svg.plot polyline").count() >= 1

            page.goto(board.base + "/board/unit/ICU-North")
            page.locator("a.patient", has_text="HM700101").click()
            page.wait_for_load_state()
            trail = page.inner_text("table.audit")
            assert "acknowledged" in trail and "Mara Quenby" in trail
            assert page.locator("table.series tbody tr").count() == 2
            page.screenshot(path=str(ARTIFACTS / "board-patient.png"), full_page=True)

            narrow = browser.new_page(viewport={"width": 390, "height": 844})
            narrow.context.add_cookies(page.context.cookies())
            narrow.goto(board.base + "/board/unit/ICU-North")
            ARTIFACTS.mkdir(exist_ok=True)
            narrow.screenshot(path=str(ARTIFACTS / "board-narrow.png"), full_page=True)
            width = narrow.evaluate("document.documentElement.scrollWidth")
            assert width <= 400, f"the narrow page scrolls sideways ({width}px)"
        finally:
            browser.close()

    acknowledged = [f for f in _flags(board) if str(f["patient_key"]).endswith("HM700101")]
    assert acknowledged and acknowledged[0]["acknowledged_by"] == "Mara Quenby"
    trail = httpx.get(board.base + f"/api/flags/{acknowledged[0]['id']}", headers=AUTH).json()
    assert ("acknowledged", "Mara Quenby") in [(e["event"], e["by"]) for e in trail["events"]]
