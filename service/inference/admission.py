"""Admission control: a bounded inference queue per replica, counted in texts, sized from speed.

Under overload a queue that admits everything makes every caller wait longer and longer; one
that refuses early keeps the wait of admitted work bounded and tells the rest at once to retry
(or go to another replica). The bound is a time, not a count: a text is admitted while the
texts already admitted and not yet finished would be done within ``max_wait`` at the measured
rate. The rate is measured from the work itself (texts over the inference threads' busy
seconds, weighted by texts so that full batches dominate) and so follows the model, the
machine and the text mix. An empty queue always admits one request, whatever its size, so a
request within the request limits is never refused on an idle replica.
"""

from __future__ import annotations

import math
import time

from textsieve.errors import DeadlinePassedError, OverloadedError

# Until the first batches are measured: a deliberately modest rate per inference thread
# (the demo model reaches several thousand texts/s per thread on one core; see bench/README.md).
INITIAL_TEXTS_PER_SECOND_PER_THREAD = 1000.0
# Exponential decay of the rate estimate, per text measured: recent work counts the most.
DECAY_TEXTS = 2000.0
# Weight of each admission in ``mean_queued``: about the last 30 requests count.
MEAN_WEIGHT = 1 / 32
# The key the connection layer sets in a request's ASGI scope once its client has gone before the
# reply was written (service/web/transport.py): its texts still queued are dropped uncomputed
# (service/inference/batcher.py) and their admission given back.
CLIENT_LEFT = "textsieve.client_left"


class Admission:
    """The replica's count of admitted, unfinished texts and its measured rate."""

    def __init__(self, *, max_wait_seconds: float, threads: int) -> None:
        self.max_wait = max_wait_seconds
        self.threads = threads
        self.queued = 0
        self.mean_queued = 0.0  # admitted texts as each request is admitted, averaged (the batcher's target)
        self.refused = 0
        self.deadline_passed = 0
        self.client_left = 0  # requests dropped from the queue uncomputed: their clients had gone
        self._texts = 0.0  # decayed sums of texts and thread-seconds measured
        self._seconds = 0.0
        self._limit = self._limit_now()

    @property
    def rate(self) -> float:
        """Texts per second the replica finishes when busy (an estimate)."""
        if self._seconds <= 0.0:
            return INITIAL_TEXTS_PER_SECOND_PER_THREAD * self.threads
        return self._texts / self._seconds * self.threads

    @property
    def limit(self) -> int:
        """Most texts admitted at once: what the measured rate finishes within ``max_wait``
        (kept from the last measurement: every request reads it, a batch changes it)."""
        return self._limit

    def _limit_now(self) -> int:
        return max(1, int(self.rate * self.max_wait))

    def admit(self, texts: int) -> None:
        """Count ``texts`` as admitted, or raise OverloadedError (the caller answers 503 at once)."""
        if self.queued > 0 and self.queued + texts > self._limit:
            self.refused += 1
            wait = self.queued / self.rate
            raise OverloadedError(
                f"this replica has {self.queued} texts in its queue, about {wait * 1000:.0f} ms of work "
                f"(admitted work waits at most {self.max_wait * 1000:.0f} ms, TEXTSIEVE_QUEUE_WAIT_MS): "
                "retry after the Retry-After seconds, or on another replica",
                retry_after=max(1, math.ceil(wait)),
            )
        self.queued += texts
        self.mean_queued += (self.queued - self.mean_queued) * MEAN_WEIGHT

    def finished(self, texts: int) -> None:
        self.queued -= texts

    def measured(self, texts: int, seconds: float) -> None:
        """One batch of ``texts`` took ``seconds`` on an inference thread."""
        if texts <= 0 or seconds <= 0.0:
            return
        keep = math.exp(-texts / DECAY_TEXTS)
        self._texts = self._texts * keep + texts
        self._seconds = self._seconds * keep + seconds
        self._limit = self._limit_now()

    def check_deadline(self, deadline: float | None, now: float | None = None) -> None:
        """Raise DeadlinePassedError when the caller's deadline (a perf_counter time) has passed."""
        if deadline is None:
            return
        now = time.perf_counter() if now is None else now
        if now > deadline:
            self.deadline_passed += 1
            raise DeadlinePassedError(
                f"the request's deadline passed {(now - deadline) * 1000:.0f} ms before inference could "
                "start (Textsieve-Deadline header); nothing was computed"
            )


__all__ = ["CLIENT_LEFT", "Admission"]
