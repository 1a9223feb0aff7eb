"""Progress display: a tqdm bar (current point, status, ETA) or one line per point.

With replicated invocations the bar counts worker processes (`steps`, `advance()`): the
points finish together in the last round, so counting points would say nothing until then.
"""
from __future__ import annotations

import math
import time


class Progress:
    def __init__(self, total: int, quiet: bool = False, stream=None, steps: int | None = None):
        self.total, self.quiet, self.stream = total, quiet, stream
        self.steps = steps           # worker processes to run, when the bar counts those
        self.n = 0
        self.t0 = time.monotonic()
        self.bar = None
        if not quiet:
            from tqdm import tqdm

            what = "points" if steps is None or steps == total else "worker runs"
            self.bar = tqdm(total=total if steps is None else steps, file=stream, unit="pt", dynamic_ncols=True,
                            bar_format="{l_bar}{bar}| {n_fmt}/{total_fmt} " + what +
                                       " [{elapsed}<{remaining}]{postfix}")

    def status(self, text: str) -> None:
        if self.bar is not None:
            self.bar.set_postfix_str(text[:60])

    def start(self, label: str) -> None:
        self.status(f"measuring {label}")

    def done(self, label: str, row: dict) -> None:
        self.n += 1
        status = row.get("status", "?")
        if self.bar is not None:
            if self.steps is None:
                self.bar.update(1)
            self.bar.set_postfix_str(f"{label}: {status}"[:60])
            return
        p50 = row.get("lat_p50_ms")
        lat = f"p50 {p50:.2f} ms" if isinstance(p50, (int, float)) and not math.isnan(p50) else ""
        why = f" ({row.get('reason')})" if status != "ok" and row.get("reason") else ""
        elapsed = time.monotonic() - self.t0
        eta = elapsed / self.n * (self.total - self.n)
        print(f"[{self.n}/{self.total}] {label}: {status}{why} {lat} eta {eta:.0f}s".rstrip(),
              file=self.stream, flush=True)

    def advance(self) -> None:
        """One worker process finished (the bar counts them when `steps` was given)."""
        if self.bar is not None and self.steps is not None:
            self.bar.update(1)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()
