"""The bench in headless Chromium (Debian's, never downloaded): sign in, label by keyboard, skip,
answer unsure, set a continuous action with the slider; then read the labels from the store.

Screenshots go to artifacts/ (gitignored) for a person to look at.
"""

from __future__ import annotations

import json
import math
import struct
import zlib
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from playwright.sync_api import expect
from sqlalchemy import select

from expertloop.queue.models import Label, Lease, QueueItem, Skip
from tests.helpers import CONTINUOUS_SPEC, DISCRETE_SPEC
from tests.queue.conftest import user_id
from tests.serving import ROOT, server_process

pytestmark = pytest.mark.browser

CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
]
ARTIFACTS = ROOT / "artifacts"
PASSWORD = "correct horse battery"


def png_bytes(pixels: np.ndarray) -> bytes:
    """A PNG file of an (height, width, 3) uint8 image (PNG spec: filter byte 0 per row)."""
    height, width, _ = pixels.shape
    raw = b"".join(b"\x00" + row.tobytes() for row in pixels)

    def chunk(tag: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + tag + data + struct.pack(">I", zlib.crc32(tag + data))

    header = struct.pack(">IIBBBBB", width, height, 8, 2, 0, 0, 0)
    return (
        b"\x89PNG\r\n\x1a\n"
        + chunk(b"IHDR", header)
        + chunk(b"IDAT", zlib.compress(raw))
        + chunk(b"IEND", b"")
    )


def camera_image() -> bytes:
    """An invented camera view: floor, a far wall and a dark box in the aisle."""
    img = np.zeros((90, 160, 3), np.uint8)
    img[:] = (214, 206, 190)
    img[:40] = (236, 232, 222)
    img[38:42] = (120, 112, 100)
    img[45:75, 95:120] = (60, 70, 85)
    return png_bytes(img)


def crossing_rows(steps: int = 40) -> dict[str, list[Any]]:
    """An invented tow-tractor approach to an aisle crossing, with a person walking across."""
    cols: dict[str, list[Any]] = {
        k: []
        for k in (
            "rollout",
            "step",
            "time_s",
            "features",
            "learner_action",
            "learner_probs",
            "scene",
            "image",
        )
    }
    image = camera_image()
    for s in range(steps):
        t = 0.1 * s
        gap = 9.0 - 1.1 * t
        speed = 1.2 - 0.25 * t + 0.05 * math.sin(3 * t)
        occluded = 1.0 if 1.2 < t < 2.4 else 0.0
        probs = [0.6 - 0.1 * t, 0.25 + 0.05 * t, 0.15 + 0.05 * t]
        scene = {
            "frame": "robot",
            "agents": [
                {"kind": "pedestrian", "x": gap, "y": 3.5 - 0.9 * t, "heading": -1.57},
                {"kind": "forklift", "x": gap + 3.0, "y": -4.0 + 0.6 * t, "heading": 1.2},
                {"kind": "robot", "x": -2.5, "y": 2.0, "heading": 0.0},
                {"kind": "pallet", "x": 5.0, "y": -2.2, "heading": 0.4},
            ],
        }
        cols["rollout"].append("demo-crossing-1")
        cols["step"].append(s)
        cols["time_s"].append(round(t, 3))
        cols["features"].append([round(gap, 3), round(speed, 3), occluded])
        cols["learner_action"].append(["proceed", "creep", "hold"][int(np.argmax(probs))])
        cols["learner_probs"].append(probs)
        cols["scene"].append(json.dumps(scene))
        cols["image"].append(image)
    return cols


@pytest.fixture
def browser():
    from pathlib import Path

    from playwright.sync_api import sync_playwright

    if not Path(CHROMIUM).exists():
        pytest.fail(
            f"browser tests drive Debian's Chromium at {CHROMIUM}: apt-get install chromium"
        )
    with sync_playwright() as playwright:
        launched = playwright.chromium.launch(
            executable_path=CHROMIUM, args=CHROMIUM_ARGS, headless=True
        )
        try:
            yield launched
        finally:
            launched.close()


def served(settings: Any) -> Any:
    """The service as deployed (uvicorn in a subprocess) on the test's store."""
    return server_process(
        settings.resolved_database_url,
        settings.data_dir,
        log_path=settings.data_dir.parent / "server.log",
    )


def labels_by(session: Any, app: Any, name: str) -> list[Label]:
    """The labels a user gave, oldest first."""
    query = select(Label).where(Label.user_id == user_id(app, name)).order_by(Label.id)
    return list(session.scalars(query).all())


def sign_in_and_open_bench(page: Any, base: str, slug: str) -> None:
    page.goto(f"{base}/loops/{slug}/bench")
    assert "/login" in page.url  # the page sends a signed-out browser to the sign-in form
    page.focus("#name")  # autofocus may land after the load event
    page.keyboard.type("ann")
    page.keyboard.press("Tab")
    page.keyboard.type(PASSWORD)
    page.keyboard.press("Enter")
    page.wait_for_url(f"{base}/loops/{slug}/bench")
    page.wait_for_selector("#bench[data-phase=ready]")


def current_item(page: Any) -> int:
    return int(page.get_attribute("#bench", "data-item-id"))


def answer_and_wait(page: Any, keys: list[str]) -> int:
    before = current_item(page)
    for key in keys:
        page.keyboard.press(key)
    # Playwright's expect() polls from its own isolated script world: wait_for_function would
    # evaluate a string in the page, which the page's Content-Security-Policy forbids.
    bench = page.locator("#bench")
    expect(bench).not_to_have_attribute("data-item-id", str(before))
    expect(bench).not_to_have_attribute("data-phase", "loading")
    return before


def test_label_by_keyboard_skip_and_unsure(make_loop, make_user, settings, app, browser):
    slug = make_loop(DISCRETE_SPEC, columns=crossing_rows(), queue=6, start=20)
    make_user("annotator", name="ann", password=PASSWORD)
    requests: list[str] = []
    with served(settings) as server:
        base = server.url
        page = browser.new_page(viewport={"width": 1440, "height": 1000})
        page.on("request", lambda request: requests.append(request.url))
        refusals: list[str] = []  # what the Content-Security-Policy blocked, if anything
        page.on(
            "console",
            lambda message: (
                refusals.append(message.text) if "Content Security Policy" in message.text else None
            ),
        )
        sign_in_and_open_bench(page, base, slug)
        assert page.is_hidden("#learner-box")  # hidden by default (show_learner_fraction 0)
        expect(page.locator("#p-left")).to_have_text("6 states")
        assert page.locator(".action[aria-pressed=true]").count() == 0
        page.keyboard.press("Tab")  # keyboard focus is visible
        outline = page.evaluate("getComputedStyle(document.activeElement).outlineStyle")
        assert outline == "solid"
        page.keyboard.press("Shift+Tab")
        page.keyboard.press(",")  # view an earlier step, then come back: the answer is for now
        assert page.is_visible("#viewing-note")
        page.keyboard.press("Escape")
        assert page.is_hidden("#viewing-note")
        page.keyboard.press("1")
        assert page.get_attribute(".action[data-action='0']", "aria-pressed") == "true"
        ARTIFACTS.mkdir(exist_ok=True)
        page.screenshot(path=str(ARTIFACTS / "bench-discrete.png"), full_page=True)
        labelled = [answer_and_wait(page, ["Enter"])]
        labelled.append(answer_and_wait(page, ["3", "Enter"]))
        labelled.append(answer_and_wait(page, ["2", "Enter"]))
        skipped = answer_and_wait(page, ["s"])
        unsure = answer_and_wait(page, ["u", "Enter"])
        expect(page.locator("#p-today")).to_have_text("4")
        page.keyboard.press(",")
        page.keyboard.press(",")
        page.screenshot(path=str(ARTIFACTS / "bench-discrete-earlier-step.png"), full_page=True)
        still_held = current_item(page)
        page.close()
    assert all(url.startswith(base) for url in requests), "the page loaded something elsewhere"
    assert refusals == []
    ann = user_id(app, "ann")
    with app.state.session_factory() as session:
        labels = labels_by(session, app, "ann")
        positions = dict(session.execute(select(QueueItem.id, QueueItem.position)).all())
        skips = session.scalars(select(Skip.item_id).where(Skip.user_id == ann)).all()
        leases = session.scalars(select(Lease.item_id).where(Lease.user_id == ann)).all()
    assert [(lab.item_id, lab.answer, lab.action) for lab in labels] == [
        (labelled[0], "action", 0),
        (labelled[1], "action", 2),
        (labelled[2], "action", 1),
        (unsure, "unsure", None),
    ]
    assert [positions[i] for i in (*labelled, skipped, unsure, still_held)] == [0, 1, 2, 3, 4, 5]
    assert skips == [skipped] and leases == [still_held]
    assert all(not lab.learner_shown and not lab.span for lab in labels)
    assert all(lab.seconds_spent is not None and lab.seconds_spent >= 0 for lab in labels)


def test_continuous_action_typed_and_nudged(make_loop, make_user, settings, app, browser):
    slug = make_loop(CONTINUOUS_SPEC, queue=2, start=5)
    make_user("annotator", name="ann", password=PASSWORD)
    with served(settings) as server:
        base = server.url
        page = browser.new_page(viewport={"width": 1440, "height": 900})
        sign_in_and_open_bench(page, base, slug)
        # the neutral start: 0 m/s and 0 1/m, both inside the bounds
        assert page.input_value("#dim-0-number") == "0"
        page.keyboard.press("Enter")  # nothing set yet: refused on the page, nothing sent
        assert "Problem" in page.inner_text("#status")
        page.keyboard.press("1")  # opens the speed_cmd field with its value selected
        assert page.evaluate("document.activeElement.id") == "dim-0-number"
        page.keyboard.type("1.4")  # replaces the value
        page.keyboard.press("Space")  # on to curvature
        assert page.evaluate("document.activeElement.id") == "dim-1-number"
        page.keyboard.type("-0.04")
        page.keyboard.press("Escape")  # leave the field, keeping the value
        page.keyboard.press("1")
        page.keyboard.press("Escape")
        page.keyboard.press("+")  # a nudge on the active dimension: 1% of the range
        page.keyboard.press("+")
        page.keyboard.press("+")
        page.keyboard.press("+")
        page.keyboard.press("+")
        assert page.input_value("#dim-0-number") == "1.5"
        assert page.locator(".dimension.changed").count() == 2
        ARTIFACTS.mkdir(exist_ok=True)
        page.screenshot(path=str(ARTIFACTS / "bench-continuous.png"), full_page=True)
        labelled = answer_and_wait(page, ["Enter"])
        page.close()
    with app.state.session_factory() as session:
        label = session.scalar(select(Label).where(Label.user_id == user_id(app, "ann")))
    assert label.item_id == labelled and label.answer == "action"
    # 1.4 + 5 x 0.02 m/s and -0.04 1/m as typed, stored as float32
    np.testing.assert_allclose(
        np.frombuffer(label.action_vec, dtype="<f4"), [1.5, -0.04], rtol=0, atol=1e-6
    )


# Claims held back or refused on the page's side of the network, so that what an annotator does
# while the next state loads, or after the server could not be reached, can be tried at will.
FLAKY_CLAIMS = """
window.__claimDelayMs = 0; window.__claimFailures = 0;
const realFetch = window.fetch;
window.fetch = function (url, init) {
  if (!String(url).endsWith('/queue/claim')) return realFetch(url, init);
  if (window.__claimFailures > 0) {
    window.__claimFailures -= 1;
    return Promise.reject(new TypeError('network down'));
  }
  const wait = window.__claimDelayMs;
  return new Promise((go) => setTimeout(go, wait)).then(() => realFetch(url, init));
};
"""


def flaky_bench(browser: Any, base: str, slug: str) -> tuple[Any, list[tuple[str, str]]]:
    """A signed-in bench page whose claims can be delayed or failed; returns it and the label
    requests it sends (address, body)."""
    context = browser.new_context(viewport={"width": 1366, "height": 768})
    context.add_init_script(FLAKY_CLAIMS)
    page = context.new_page()
    sent: list[tuple[str, str]] = []
    page.on(
        "request",
        lambda r: sent.append((r.url, r.post_data or "")) if r.url.endswith("/labels") else None,
    )
    sign_in_and_open_bench(page, base, slug)
    return page, sent


def test_keys_while_the_next_state_loads_answer_no_state(
    make_loop, make_user, settings, app, browser
):
    """An answer typed after Enter, before the next state is shown, is sent for no state: it
    used to go to the state just answered, where the server returned the stored label as a
    repeat and the page said the new answer was saved."""
    slug = make_loop(DISCRETE_SPEC, queue=3)
    make_user("annotator", name="ann", password=PASSWORD)
    with served(settings) as server:
        page, sent = flaky_bench(browser, server.url, slug)
        first = current_item(page)
        page.evaluate("window.__claimDelayMs = 1500")
        page.keyboard.press("1")
        page.keyboard.press("Enter")
        expect(page.locator("#status")).to_contain_text("Saved: 1 proceed.")
        page.keyboard.press("2")  # meant for the next state, which is not shown yet
        page.keyboard.press("Enter")
        bench = page.locator("#bench")
        expect(bench).not_to_have_attribute("data-item-id", str(first))
        expect(bench).to_have_attribute("data-phase", "ready")
        status = page.inner_text("#status")
        page.close()
    assert "creep" not in status, status
    assert len(sent) == 1 and sent[0][0].endswith(f"/items/{first}/labels"), sent
    with app.state.session_factory() as session:
        labels = labels_by(session, app, "ann")
    assert [(lab.item_id, lab.action) for lab in labels] == [(first, 0)]


def test_r_tries_again_after_the_next_state_could_not_be_fetched(
    make_loop, make_user, settings, app, browser
):
    """The page says "Press R to try again" when a claim cannot reach the server; R used to
    work only on the empty-queue page, so the bench stayed stuck until reloaded."""
    slug = make_loop(DISCRETE_SPEC, queue=3)
    make_user("annotator", name="ann", password=PASSWORD)
    with served(settings) as server:
        page, sent = flaky_bench(browser, server.url, slug)
        first = current_item(page)
        page.evaluate("window.__claimFailures = 1")
        page.keyboard.press("3")
        page.keyboard.press("Enter")
        expect(page.locator("#status")).to_contain_text("Press R to try again")
        page.keyboard.press("r")
        bench = page.locator("#bench")
        expect(bench).to_have_attribute("data-phase", "ready")
        expect(bench).not_to_have_attribute("data-item-id", str(first))
        page.close()
    assert len(sent) == 1, sent
    with app.state.session_factory() as session:
        labels = labels_by(session, app, "ann")
    assert [(lab.item_id, lab.action) for lab in labels] == [(first, 2)]


@pytest.fixture(autouse=True)
def _artifacts_ignored() -> None:
    # screenshots must never be committed
    assert "/artifacts/" in Path(ROOT / ".gitignore").read_text()
