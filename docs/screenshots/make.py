"""Regenerate the terminal UI's screenshots in this folder (SVG, via Textual's save_screenshot).

    python docs/screenshots/make.py

Drives ``relaxtui open grids/electrodes.toml`` with Textual's pilot at 80 x 24
and 160 x 45: a run, the residual view, the history with the factor per chunk,
and the ω study after a scan typed in the UI. Every number on the pictures
is what that session measured on the machine that ran this script.
"""

from __future__ import annotations

import asyncio
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent.parent
sys.path.insert(0, str(ROOT))

from relaxtui.tui.app import RelaxApp  # noqa: E402

CASE = ROOT / "grids" / "electrodes.toml"


async def until(pilot, condition, limit=600.0):
    loop = asyncio.get_running_loop()
    end = loop.time() + limit
    while not condition():
        if loop.time() > end:
            raise SystemExit("gave up waiting")
        await pilot.pause(0.1)


async def idle(pilot, app):
    await until(pilot, lambda: app.active is None and app.records and app.records[-1].result is not None)
    await pilot.pause(0.5)


async def session(size):
    cols, rows = size
    app = RelaxApp(CASE)
    async with app.run_test(size=size) as pilot:
        await until(pilot, lambda: app.case is not None)

        def shot(name):
            app.save_screenshot(filename=f"{name}-{cols}x{rows}.svg", path=str(HERE))
            print("wrote", f"{name}-{cols}x{rows}.svg")

        await pilot.press("s")
        await idle(pilot, app)
        app.clear_notifications()
        await pilot.pause(0.3)
        shot("field")
        await pilot.press("v")
        await pilot.pause(0.8)
        shot("residual")
        await pilot.press("v", "v")
        if cols < 120:
            await pilot.press("2")
            await pilot.pause(0.8)
            shot("history")
        await pilot.press("r", *"1.90:1.98:0.02", "enter")
        await until(pilot, lambda: len(app.records) >= 6 and app.active is None and not app.scan)
        await pilot.pause(0.5)
        app.clear_notifications()
        await pilot.press("w")
        await pilot.pause(0.8)
        shot("omega")


def main() -> None:
    for size in ((80, 24), (160, 45)):
        asyncio.run(session(size))


if __name__ == "__main__":
    main()
