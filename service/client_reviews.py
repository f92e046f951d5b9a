"""Review methods of :class:`service.client.NightbankClient` (a mixin over its request helpers): the review
queue, a night's reviews, previews, adjudication, the review context and the study's inter-rater figures."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from .client_base import ClientCalls

__all__ = ["ReviewMethods"]


def _review_body(reviewer: str | None, *, wake_intervals: Sequence[Mapping[str, int]] = (),
                 sleep_intervals: Sequence[Mapping[str, int]] = (), rest_interval: Mapping[str, int] | None = None,
                 labels: Sequence[int | None] | None = None, note: str | None = None) -> dict[str, Any]:
    body: dict[str, Any] = {} if reviewer is None else {"reviewer": reviewer}
    if labels is not None:
        body["labels"] = list(labels)
    else:
        body |= {"wake_intervals": [dict(i) for i in wake_intervals],
                 "sleep_intervals": [dict(i) for i in sleep_intervals],
                 "rest_interval": None if rest_interval is None else dict(rest_interval)}
    if note is not None:
        body["note"] = note
    return body


class ReviewMethods(ClientCalls):
    """The review queue and blind double review of nights without PSG (mixed into the client)."""

    def _night_url(self, study: str, participant: str, night_id: str) -> str:  # provided by the client
        raise NotImplementedError

    def review_queue(self, study: str, *, limit: int | None = None, status: str | None = None) -> list[dict[str, Any]]:
        """Nights without PSG, highest review priority first (all of them, or the first ``limit``).

        Parameters
        ----------
        study : str
        limit : int, optional
            At most this many nights (None: every queued night, fetched page by page).
        status : {"open", "in_review", "reviewed", "adjudicated"}, optional
            Only nights of this review status.
        """
        params = {} if status is None else {"status": status}
        if limit is not None:
            return list(self._json("GET", f"/v1/studies/{study}/review-queue",
                                   params={**params, "limit": limit, "offset": 0})["data"])
        return list(self._pages(f"/v1/studies/{study}/review-queue", params=params))

    def review_context(self, study: str, participant: str, night_id: str) -> dict[str, Any]:
        """What a reviewer is shown for a night (counts, calls, P(sleep), intervals, queue neighbours)."""
        return self._json("GET", f"{self._night_url(study, participant, night_id)}/review-context")

    def post_review(self, study: str, participant: str, night_id: str, *, reviewer: str,
                    wake_intervals: Sequence[Mapping[str, int]] = (), sleep_intervals: Sequence[Mapping[str, int]] = (),
                    rest_interval: Mapping[str, int] | None = None, labels: Sequence[int | None] | None = None,
                    note: str | None = None) -> dict[str, Any]:
        """Submit a review: intervals ``{"start_epoch", "end_epoch"}`` (end exclusive) or per-epoch ``labels``."""
        body = _review_body(reviewer, wake_intervals=wake_intervals, sleep_intervals=sleep_intervals,
                            rest_interval=rest_interval, labels=labels, note=note)
        return self._json("POST", f"{self._night_url(study, participant, night_id)}/reviews", json=body)

    def night_reviews(self, study: str, participant: str, night_id: str) -> dict[str, Any]:
        """The night's reviews this token may see, and their discrepancy once both are in."""
        return self._json("GET", f"{self._night_url(study, participant, night_id)}/reviews")

    def preview_review(self, study: str, participant: str, night_id: str, *,
                       wake_intervals: Sequence[Mapping[str, int]] = (),
                       sleep_intervals: Sequence[Mapping[str, int]] = (),
                       rest_interval: Mapping[str, int] | None = None,
                       labels: Sequence[int | None] | None = None) -> dict[str, Any]:
        """The parameters and label counts a review would give (nothing stored)."""
        body = _review_body(None, wake_intervals=wake_intervals, sleep_intervals=sleep_intervals,
                            rest_interval=rest_interval, labels=labels)
        return self._json("POST", f"{self._night_url(study, participant, night_id)}/reviews/preview", json=body)

    def adjudicate(self, study: str, participant: str, night_id: str, *, adjudicator: str, accept: str | None = None,
                   wake_intervals: Sequence[Mapping[str, int]] = (), sleep_intervals: Sequence[Mapping[str, int]] = (),
                   rest_interval: Mapping[str, int] | None = None, labels: Sequence[int | None] | None = None,
                   note: str | None = None) -> dict[str, Any]:
        """Store the night's correction: ``accept`` a review id, or the adjudicator's own intervals or labels."""
        if accept is not None:
            body: dict[str, Any] = {"reviewer": adjudicator, "accept": accept}
            if note is not None:
                body["note"] = note
        else:
            body = _review_body(adjudicator, wake_intervals=wake_intervals, sleep_intervals=sleep_intervals,
                                rest_interval=rest_interval, labels=labels, note=note)
        return self._json("POST", f"{self._night_url(study, participant, night_id)}/reviews/adjudication", json=body)

    def review_agreement(self, study: str) -> dict[str, Any]:
        """The study's inter-rater figures: reviewer vs reviewer, and reviews and corrections vs the model."""
        return self._json("GET", f"/v1/studies/{study}/reviews/agreement")
