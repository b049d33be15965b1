"""Helpers of the terminal-UI tests (Textual's pilot): wait for the workers a key started."""

from __future__ import annotations


async def settle(pilot, rounds: int = 3):
    """Let every worker the last action started finish (``rounds`` times: a load may start
    another)."""
    from textual.worker import WorkerCancelled

    for _ in range(rounds):
        await pilot.pause()
        try:
            await pilot.app.workers.wait_for_complete()
        except WorkerCancelled:  # an exclusive reload replaced an older load; wait again
            continue
        await pilot.pause()


async def press(pilot, *keys):
    """Press ``keys`` in turn, then settle."""
    for k in keys:
        await pilot.press(k)
    await settle(pilot, rounds=2)
