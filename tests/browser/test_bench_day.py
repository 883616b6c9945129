"""A day at the bench, keyboard only, at 1366x768: 30 discrete and 10 continuous states, with
20 features and a scene with static geometry; the page never scrolls, every feature and the
answer controls stay in view, the key presses per state are counted, the empty queue shows only
its message, and recent labels are undone and changed from the keyboard.

Screenshots and the measured Enter-to-next latencies go to a temporary folder (printed), for a
person to look at; nothing is committed.
"""

from __future__ import annotations

import json
import math
import statistics
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from sqlalchemy import select

from expertloop.queue.models import ANSWER_UNDONE, Label
from tests.browser.test_bench import PASSWORD, sign_in_and_open_bench
from tests.queue.conftest import user_id
from tests.serving import server_process

pytestmark = pytest.mark.browser

VIEWPORT = {"width": 1366, "height": 768}
SHOTS = Path(tempfile.gettempdir()) / "expertloop-bench-day"
FEATURES = [
    {"name": n, "unit": u}
    for n, u in [
        ("gap_to_crossing", "m"), ("speed", "m/s"), ("accel", "m/s2"), ("heading_err", "rad"),
        ("lateral_off", "m"), ("cart_count", ""), ("cart_sway", "rad"), ("load_kg", "kg"),
        ("nearest_person", "m"), ("nearest_vehicle", "m"), ("occluded_left", ""),
        ("occluded_right", ""), ("crossing_width", "m"), ("rack_gap_left", "m"),
        ("rack_gap_right", "m"), ("floor_grip", ""), ("light_level", "lx"),
        ("horn_ready", ""), ("battery", "%"), ("time_in_aisle", "s"),
    ]
]  # fmt: skip
# an invented tow tractor with a small loading arm: seven commands
DIMENSIONS = [
    {"name": "speed_cmd", "low": 0.0, "high": 2.0, "unit": "m/s"},
    {"name": "curvature", "low": -0.2, "high": 0.2, "unit": "1/m"},
    {"name": "hitch_lift", "low": -1.0, "high": 1.0, "unit": ""},
    {"name": "arm_base", "low": -1.0, "high": 1.0, "unit": "rad/s"},
    {"name": "arm_lift", "low": -1.0, "high": 1.0, "unit": "rad/s"},
    {"name": "arm_reach", "low": -1.0, "high": 1.0, "unit": "m/s"},
    {"name": "gripper", "low": -1.0, "high": 1.0, "unit": ""},
]
EIGHTH = {"name": "beacon", "low": 0.0, "high": 1.0, "unit": ""}


def scene(t: float) -> dict[str, Any]:
    """Invented: a person crossing ahead, a forklift, a rack end, a far vehicle beyond the view,
    the aisle's edges, the crossing zone and a keep-out area."""
    return {
        "frame": "robot",
        "agents": [
            {"kind": "pedestrian", "x": 6.0 - t, "y": 2.5 - 0.8 * t, "heading": -1.57},
            {"kind": "forklift", "x": 9.0, "y": -3.0 + 0.5 * t, "heading": 1.57},
            {"kind": "rack end", "x": 13.8, "y": 2.2, "heading": 0.0},
            {"kind": "tugger", "x": -4.0, "y": 0.5, "heading": 0.0},
            {"kind": "truck", "x": 48.0, "y": -6.0, "heading": 3.1},
        ],
        "geometry": [
            {"kind": "line", "points": [[-6, 1.6], [16, 1.6]], "label": "aisle edge"},
            {"kind": "line", "points": [[-6, -1.6], [16, -1.6]]},
            {"kind": "polygon", "points": [[7, 1.6], [10, 1.6], [10, -1.6], [7, -1.6]],
             "style": "zone", "label": "crossing"},
            {"kind": "polygon", "points": [[11, -2], [13, -2], [13, -4], [11, -4]],
             "style": "keepout"},
        ],
    }  # fmt: skip


def columns(steps: int, *, dims: int | None, first_expert: bool = False) -> dict[str, list]:
    """One invented rollout at 10 Hz with 20 features; discrete when `dims` is None."""
    rng = np.random.default_rng(7)
    cols: dict[str, list] = {
        k: []
        for k in ("rollout", "step", "time_s", "features", "control", "learner_action", "scene")
    }
    cols["expert_action"] = []
    for s in range(steps):
        t = 0.1 * s
        cols["rollout"].append("day-1")
        cols["step"].append(s)
        cols["time_s"].append(round(t, 3))
        cols["features"].append((rng.normal(size=len(FEATURES)) + 2.0).round(3).tolist())
        expert = first_expert and s == 0
        cols["control"].append("expert" if expert else "learner")
        if dims is None:
            cols["learner_action"].append(["proceed", "creep", "hold"][s % 3])
            cols["expert_action"].append(None)
        else:
            act = [round(0.1 * math.sin(t + k), 3) for k in range(dims)]
            cols["learner_action"].append(act)
            cols["expert_action"].append(
                [0.5, 0.0, 0.0, 0.2, 0.0, 0.0, 0.0][:dims] if expert else None
            )
        cols["scene"].append(json.dumps(scene(t)))
    return cols


def spec(slug: str, dims: list[dict] | None) -> dict[str, Any]:
    space = (
        {"kind": "discrete", "actions": ["proceed", "creep", "hold"]}
        if dims is None
        else {"kind": "continuous", "dimensions": dims}
    )
    return {"slug": slug, "title": f"Tow tractor day ({slug}, invented)", "features": FEATURES,
            "action_space": space}  # fmt: skip


def wait_until(page: Any, expression: str, timeout_s: float = 30.0) -> None:
    """Poll an expression through Playwright's evaluate (the page's Content-Security-Policy
    forbids the string evaluation that wait_for_function does inside the page)."""
    deadline = time.monotonic() + timeout_s
    while not page.evaluate(f"() => Boolean({expression})"):
        assert time.monotonic() < deadline, f"timed out waiting for {expression}"
        time.sleep(0.01)


class Keys:
    """Presses keys on the page and counts them."""

    def __init__(self, page: Any) -> None:
        self.page = page
        self.count = 0

    def press(self, *keys: str) -> None:
        for key in keys:
            self.page.keyboard.press(key)
            self.count += 1

    def type(self, text: str) -> None:
        for char in text:
            self.press(char)


WATCH = """() => {
  const bench = document.getElementById('bench');
  window.__before = bench.dataset.itemId;
  window.__sent = null; window.__shown = null;
  if (!window.__listening) {
    window.__listening = true;
    document.addEventListener('keydown', (e) => {
      if (e.key === 'Enter' && window.__sent === null) window.__sent = performance.now();
    }, { capture: true });
  }
  const seen = new MutationObserver(() => {
    if (bench.dataset.phase !== 'loading' && bench.dataset.itemId !== window.__before) {
      window.__shown = performance.now(); seen.disconnect();
    }
  });
  seen.observe(bench, { attributes: true });
}"""


def answer(page: Any, keys: Keys, sequence: list[str]) -> tuple[int, float]:
    """Press the keys of one answer (the last is Enter); returns (item id, ms to the next)."""
    before = int(page.get_attribute("#bench", "data-item-id"))
    page.evaluate(WATCH)
    for key in sequence:
        keys.press(key)
    wait_until(page, "window.__shown !== null")
    return before, page.evaluate("window.__shown - window.__sent")


def assert_fits(page: Any) -> None:
    """No page scrolling; every feature, the answer controls and Submit inside the window."""
    layout = page.evaluate(
        """() => {
      const inside = (el) => { const r = el.getBoundingClientRect();
        if (r.width === 0 || r.top < 0 || r.bottom > innerHeight || r.right > innerWidth) return false;
        const hit = document.elementFromPoint(r.left + r.width / 2, r.top + r.height / 2);
        return hit === el || el.contains(hit) || (hit !== null && hit.contains(el)); };
      return {
        scroll: document.scrollingElement.scrollHeight, height: innerHeight,
        features: [...document.querySelectorAll('#features [data-feature]')].map(inside),
        controls: [...document.querySelectorAll('#answer-form .action, #answer-form .dim-number,'
          + ' #unsure, #submit')].map(inside),
      }; }"""
    )
    assert layout["scroll"] <= layout["height"], layout
    assert layout["features"] and all(layout["features"]), layout["features"]
    assert layout["controls"] and all(layout["controls"]), layout["controls"]


def test_a_day_at_the_bench(make_loop, make_user, settings, app, browser):
    SHOTS.mkdir(parents=True, exist_ok=True)
    discrete = make_loop(spec("day-discrete", None), columns=columns(34, dims=None), queue=30)
    continuous = make_loop(
        spec("day-continuous", DIMENSIONS),
        settings={"continuous_start": "previous", "context_commands": "all",
                  "key_features": ["nearest_person", "speed", "gap_to_crossing"]},
        columns=columns(14, dims=7, first_expert=True), queue=10, start=1,
    )  # fmt: skip
    eight = make_loop(spec("day-eight", [*DIMENSIONS, EIGHTH]), columns=columns(6, dims=8), queue=2)
    make_user("annotator", name="ann", password=PASSWORD)
    figures: dict[str, Any] = {}
    with server_process(
        settings.resolved_database_url,
        settings.data_dir,
        log_path=settings.data_dir.parent / "server.log",
    ) as server:
        base = server.url
        page = browser.new_page(viewport=VIEWPORT)
        sign_in_and_open_bench(page, base, discrete)
        wait_until(page, "document.getElementById('p-left').textContent === '30 states'")
        assert_fits(page)
        assert page.is_visible(".legend [data-legend=zone]")  # geometry present: legend entry
        assert page.is_visible(".legend [data-legend=beyond]")  # the truck 48 m ahead
        assert page.locator("#scene .beyond").count() == 1
        page.screenshot(path=str(SHOTS / "discrete-first.png"))
        keys = Keys(page)
        latencies, per_state = [], []
        for n in range(30):
            start = keys.count
            _, ms = answer(page, keys, [str(1 + n % 3), "Enter"])
            latencies.append(ms)
            per_state.append(keys.count - start)
            if n in (0, 14):
                assert_fits(page)
        assert per_state == [2] * 30 and keys.count == 60
        # the empty queue: only its message and what to do next
        page.wait_for_selector("#bench[data-phase=empty]")
        assert page.is_visible("#empty") and page.is_hidden("#workspace")
        assert page.locator("#answer-form").is_hidden() and page.locator("#scene").is_hidden()
        page.screenshot(path=str(SHOTS / "discrete-empty.png"))
        # recent labels, by keyboard: undo the newest (it comes back), answer it again, change it
        keys.press("l")
        wait_until(page, "document.querySelectorAll('#recent-list li').length === 20")
        page.screenshot(path=str(SHOTS / "recent-labels.png"))
        keys.press("Delete")
        page.wait_for_selector("#bench[data-phase=ready]")
        keys.press("Escape")  # close the panel
        undone_item = int(page.get_attribute("#bench", "data-item-id"))
        answer(page, keys, ["3", "Enter"])
        keys.press("l")
        wait_until(page, "document.querySelectorAll('#recent-list li').length === 20")
        keys.press("c")
        page.wait_for_selector("#bench[data-phase=correcting]")
        page.screenshot(path=str(SHOTS / "changing-a-label.png"))
        keys.press("2", "Enter")
        wait_until(page, "document.getElementById('status').textContent.startsWith('Changed')")
        figures["discrete_latency_ms"] = latencies

        # continuous: 7 dimensions, each state starting from the step before's answer
        page.goto(f"{base}/loops/{continuous}/bench")
        page.wait_for_selector("#bench[data-phase=ready]")
        assert_fits(page)
        assert "expert's command on the step before" in page.inner_text("#start-note")
        assert page.locator("#features .feature.key dt").all_inner_texts() == [
            "nearest_person", "speed", "gap_to_crossing"]  # fmt: skip
        page.screenshot(path=str(SHOTS / "continuous-first.png"))
        expected = [0.5, 0.0, 0.0, 0.2, 0.0, 0.0, 0.0]  # the expert's command on step 0
        answers, latencies, per_state = [], [], []
        for n in range(10):
            start = keys.count
            if n % 2 == 0:  # curvature and arm_lift differ from the start
                curvature = ["0.1", "-0.1"][n % 4 // 2]
                sequence = ["2", *curvature, "Escape", "5", "-", "1", "Enter"]
                expected[1], expected[4] = float(curvature), -1.0
            else:  # hitch_lift and arm_base, one after the other
                sequence = ["3", "1", " ", "0", ".", "5", "Enter"]
                expected[2], expected[3] = 1.0, 0.5
            item, ms = answer(page, keys, sequence)
            answers.append((item, list(expected)))
            latencies.append(ms)
            per_state.append(keys.count - start)
            if n == 4:
                page.keyboard.press(",")  # the plots show past commands: learner and expert
                page.screenshot(path=str(SHOTS / "continuous-middle.png"))
                page.keyboard.press("Escape")
                assert_fits(page)
        assert max(per_state) <= 10, per_state
        assert per_state == [10 if n % 4 == 2 else 9 if n % 2 == 0 else 7 for n in range(10)]
        figures["continuous_keys_per_state"] = per_state
        figures["continuous_latency_ms"] = latencies

        page.goto(f"{base}/loops/{eight}/bench")
        page.wait_for_selector("#bench[data-phase=ready]")
        assert_fits(page)
        page.screenshot(path=str(SHOTS / "eight-dimensions.png"))
        page.close()
    ann = user_id(app, "ann")
    with app.state.session_factory() as session:
        rows = session.scalars(select(Label).where(Label.user_id == ann).order_by(Label.id)).all()
    by_item = {r.item_id: r for r in rows if r.action_vec is not None and r.supersedes_id is None}
    for item, vector in answers:
        stored = np.frombuffer(by_item[item].action_vec, dtype="<f4")
        np.testing.assert_allclose(stored, vector, rtol=0, atol=1e-6)
    undone = [r for r in rows if r.answer == ANSWER_UNDONE]
    assert len(undone) == 1
    changed = [r for r in rows if r.supersedes_id is not None and r.answer != ANSWER_UNDONE]
    assert [(r.item_id, r.action) for r in changed] == [(undone_item, 1)]
    for name in ("discrete_latency_ms", "continuous_latency_ms"):
        values = figures[name]
        figures[name] = {"median": statistics.median(values), "max": max(values), "n": len(values)}
    (SHOTS / "figures.json").write_text(json.dumps(figures, indent=2))
    print(f"screenshots and figures in {SHOTS}: {json.dumps(figures)}")
