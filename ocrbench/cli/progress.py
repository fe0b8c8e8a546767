"""Progress bars for long commands: feeds the engine's progress events to a rich bar."""

from __future__ import annotations

from rich.progress import Progress

class RunProgress:
    """Feeds runner progress events to a rich progress bar: pages worked on, lines/s, time left."""

    def __init__(self, bar: Progress, task):
        self.bar, self.task = bar, task

    def __call__(self, ev) -> None:
        if ev.kind == "start":
            note = f" ({ev.pages_skipped} already done)" if ev.pages_skipped else ""
            self.bar.update(self.task, description=f"recognising{note}", total=ev.pages_total - ev.pages_skipped,
                            completed=0)
        elif not ev.skipped:
            lps = f"{ev.lines_done / ev.elapsed:.1f}" if ev.elapsed > 0 else "-"
            self.bar.update(self.task, advance=1, lps=lps)
