"""Keep a shelf in step with a living source: migrate, optionally publish, sleep, repeat.

Each round is an incremental migration (the ledger makes it convert only new or changed
files), then a publish that uploads only what changed. A bad source file never stops the loop
(migrate records it and carries on); a source or destination that cannot be reached (network
outage, unmounted share) is logged and tried again next round. Ctrl-C ends it between steps.
"""

from __future__ import annotations

import logging
import re
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path

from archive import layout
from archive.migrate import MigrateOptions, migrate
from archive.sitefile import SiteFile

log = logging.getLogger(__name__)

_UNITS = {"s": 1, "m": 60, "h": 3600, "d": 86400}
_DURATION = re.compile(r"(\d+(?:\.\d*)?|\.\d+)\s*([smhd]?)")
UNREACHABLE = (OSError, TimeoutError)  # ConnectionError is an OSError


def parse_duration(text: str | float) -> float:
    """Seconds from ``"10m"``, ``"1h30m"``, ``"30s"``, ``"0.5d"`` or a plain number of seconds."""
    if isinstance(text, (int, float)):
        seconds = float(text)
    else:
        s = text.strip().lower().replace(" ", "")
        parts = _DURATION.findall(s)
        if not s or "".join(n + u for n, u in parts) != s:
            raise ValueError(f"{text!r} is not a duration; write e.g. 30s, 10m, 1h, 1h30m or 0.5d")
        seconds = sum(float(n) * _UNITS[u or "s"] for n, u in parts)
    if seconds < 0:
        raise ValueError(f"a duration cannot be negative: {text!r}")
    return seconds


@dataclass
class RoundResult:
    """One round, as logged: what was converted, what failed, what was published."""

    round: int
    new_scans: list[str] = field(default_factory=list)
    failed: int = 0  # source files that are not converted (all of them, not only new ones)
    new_failed: list[str] = field(default_factory=list)  # failing for the first time in this watch
    published: int | None = None  # files uploaded; None when not publishing or publish failed
    report: bool = False  # index.html rewritten
    errors: list[str] = field(default_factory=list)  # steps that failed this round, retried next
    seconds: float = 0.0

    def line(self) -> str:
        pub = "-" if self.published is None else str(self.published)
        text = (f"round {self.round}: {len(self.new_scans)} new scan(s), {self.failed} failed file(s)"
                f" ({len(self.new_failed)} new), {pub} published file(s), {self.seconds:.1f} s")
        return text + ("; errors: " + " | ".join(self.errors) if self.errors else "")

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass
class WatchResult:
    rounds: list[RoundResult] = field(default_factory=list)
    interrupted: bool = False


def watch(
    source: str,
    shelf: str,
    every: float | str = 600,
    publish_to: str | None = None,
    rounds: int | None = None,
    site_file: SiteFile | str | None = None,
    crs: str | None = None,
    *,
    options: MigrateOptions | None = None,
    publish_options: dict | None = None,
    report: bool = True,
    on_round: Callable[[RoundResult], None] | None = None,
    **settings,
) -> WatchResult:
    """Run rounds every ``every`` seconds (or "10m") until ``rounds`` are done or Ctrl-C.

    Rounds start on a fixed beat (start + k × every); a round that overruns starts the next one
    at once. ``report`` rewrites the shelf's ``index.html`` when the catalog is newer than it,
    so a publish carries a current health page. ``on_round`` sees every finished round.
    Each round is one ``migrate`` with ``options`` (``settings`` are MigrateOptions fields applied
    over it, e.g. ``salvage=True``); ``publish_options`` are the destination's fsspec options.
    """
    options = replace(options or MigrateOptions(), **settings)
    interval = parse_duration(every)
    result = WatchResult()
    failing: set[str] = set()
    started = time.monotonic()
    number = 0
    try:
        while rounds is None or number < rounds:
            number += 1
            one = _round(number, source, shelf, publish_to, site_file, crs, options, publish_options, report, failing)
            result.rounds.append(one)
            log.info("%s", one.line())
            if on_round is not None:
                on_round(one)
            if rounds is not None and number >= rounds:
                break
            time.sleep(max(0.0, started + number * interval - time.monotonic()))
    except KeyboardInterrupt:
        result.interrupted = True
        log.info("watch stopped after %d round(s)", len(result.rounds))
    return result


def _round(number: int, source: str, shelf: str, publish_to: str | None, site_file, crs, options: MigrateOptions,
           publish_options: dict | None, report: bool, failing: set[str]) -> RoundResult:
    t0 = time.monotonic()
    one = RoundResult(number)
    problems_changed = False
    try:
        migrated = migrate(source, shelf, site_file, crs, options=options)
    except UNREACHABLE as exc:
        one.errors.append(f"migrate: {type(exc).__name__}: {exc}")
    else:
        one.new_scans = list(migrated.converted)
        now_failing = {rel for rel, _ in migrated.failed}
        one.failed = len(now_failing)
        one.new_failed = sorted(now_failing - failing)
        problems_changed = now_failing != failing
        failing.clear()
        failing.update(now_failing)
    if report and (problems_changed or _index_stale(Path(shelf))):
        one.report = _write_index(shelf, one)
    if publish_to is not None and (Path(shelf) / layout.CATALOG).exists():
        one.published = _publish(shelf, publish_to, publish_options, one)
    one.seconds = time.monotonic() - t0
    return one


def _index_stale(shelf: Path) -> bool:
    """The catalog changed since the page was written (unless migrate already rewrote it)."""
    catalog, index = shelf / layout.CATALOG, shelf / layout.REPORT
    return catalog.exists() and (not index.exists() or index.stat().st_mtime < catalog.stat().st_mtime)


def _write_index(shelf: str, one: RoundResult) -> bool:
    from archive.report import write_index_html

    try:
        write_index_html(shelf)
    except Exception as exc:  # the page is a courtesy: never let it stop the archive's updates
        log.exception("round %d: index.html not written", one.round)
        one.errors.append(f"report: {type(exc).__name__}: {exc}")
        return False
    return True


def _publish(shelf: str, dest: str, options: dict | None, one: RoundResult) -> int | None:
    from archive.publish import PublishError, publish

    try:
        return len(publish(shelf, dest, options).uploaded)
    except (PublishError, *UNREACHABLE) as exc:  # messages are already free of credentials
        one.errors.append(f"publish: {exc}")
        return None
