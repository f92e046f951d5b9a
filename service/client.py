"""A small HTTP client of the nightbank API for lab-server scripts.

Problem responses come back as the same typed errors the server raised: :class:`NotFound`,
:class:`Forbidden`, :class:`Unauthorized`, :class:`Conflict`, :class:`Unprocessable`,
:class:`~models.InvalidNightError` (with every problem) and so on. Each carries ``problem``, the
server's problem details (``code``, ``detail``, ``problems``, ``request_id``), and ``status``.

Examples
--------
>>> with NightbankClient("http://127.0.0.1:8765", token="nb_...") as nb:  # doctest: +SKIP
...     nb.create_study("gullwing", "Gullwing crew rest")
...     nb.push_file("gullwing", "GW-01", "night1.json")
...     job = nb.wait_for_job(nb.train_pooled("gullwing")["job_id"])
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import httpx

from models import InvalidNightError, NightbankError, Problem

from .errors import (
    BadRequest,
    Conflict,
    Forbidden,
    NotFound,
    PayloadTooLarge,
    ServiceError,
    StorageError,
    Unauthorized,
    Unprocessable,
    UnsupportedMediaType,
)

__all__ = ["FORMAT_MEDIA_TYPES", "NightbankClient", "problem_error"]

#: night file format -> content type of the ingest request
FORMAT_MEDIA_TYPES = {"json": "application/json", "csv": "text/csv", "parquet": "application/vnd.apache.parquet"}
_BY_STATUS: dict[int, type[ServiceError]] = {
    400: BadRequest, 401: Unauthorized, 403: Forbidden, 404: NotFound, 409: Conflict, 413: PayloadTooLarge,
    415: UnsupportedMediaType, 422: Unprocessable, 503: StorageError,
}


def problem_error(response: httpx.Response) -> NightbankError:
    """The typed error for a problem response (``problem`` and ``status`` attached)."""
    try:
        problem = response.json()
        if not isinstance(problem, dict):
            raise ValueError
    except ValueError:
        problem = {"code": "http_error", "detail": response.text[:300] or response.reason_phrase}
    code, detail = str(problem.get("code", "http_error")), str(problem.get("detail", response.reason_phrase))
    exc: NightbankError
    if code == "invalid_night":
        exc = InvalidNightError([Problem(p.get("code", ""), p.get("message", ""), p.get("location", {}))
                                 for p in problem.get("problems") or []])
    else:
        exc = _BY_STATUS.get(response.status_code, ServiceError)(detail, code=code)
    vars(exc).update(problem=problem, status=response.status_code)  # the server's problem details, kept as sent
    return exc


class NightbankClient:
    """Client of one nightbank server.

    Parameters
    ----------
    base_url : str
        E.g. ``http://127.0.0.1:8765``.
    token : str
        Bearer token (``nightbank token create``).
    timeout_s : float, default=60.0
        Per-request timeout, seconds.
    transport : httpx.BaseTransport, optional
        A custom transport (``httpx.MockTransport``, a proxy); default: plain HTTP.
    """

    def __init__(self, base_url: str, *, token: str, timeout_s: float = 60.0,
                 transport: httpx.BaseTransport | None = None) -> None:
        self.base_url = base_url.rstrip("/")
        self._http = httpx.Client(base_url=self.base_url, headers={"Authorization": f"Bearer {token}"},
                                  timeout=timeout_s, transport=transport)

    def __enter__(self) -> NightbankClient:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        self._http.close()

    def _request(self, method: str, url: str, **kwargs: Any) -> httpx.Response:
        response = self._http.request(method, url, **kwargs)
        if response.is_error:
            raise problem_error(response)
        return response

    def _json(self, method: str, url: str, **kwargs: Any) -> Any:
        return self._request(method, url, **kwargs).json()

    # ---- studies, participants, nights ----------------------------------------------------
    def health(self) -> dict[str, Any]:
        return self._json("GET", "/healthz")

    def create_study(self, study_id: str, name: str) -> dict[str, Any]:
        return self._json("POST", "/v1/studies", json={"study_id": study_id, "name": name})

    def list_studies(self) -> list[dict[str, Any]]:
        return self._json("GET", "/v1/studies")

    def _pages(self, url: str, page_size: int = 500) -> Iterator[dict[str, Any]]:
        offset = 0
        while True:
            page = self._json("GET", url, params={"limit": page_size, "offset": offset})
            yield from page["data"]
            offset += len(page["data"])
            if not page["data"] or offset >= page["count"]:
                return

    def list_participants(self, study: str) -> list[dict[str, Any]]:
        return list(self._pages(f"/v1/studies/{study}/participants"))

    def list_nights(self, study: str, participant: str) -> list[dict[str, Any]]:
        return list(self._pages(f"/v1/studies/{study}/participants/{participant}/nights"))

    def get_night(self, study: str, participant: str, night_id: str) -> dict[str, Any]:
        return self._json("GET", f"/v1/studies/{study}/participants/{participant}/nights/{night_id}")

    def post_night(self, study: str, participant: str, data: bytes | dict[str, Any], *, fmt: str = "json",
                   tz: str | None = None) -> dict[str, Any]:
        """Store a night (``data``: JSON object, or file bytes in ``fmt``); ``created`` tells if it was new."""
        content = json.dumps(data).encode() if isinstance(data, dict) else data
        params = {"tz": tz} if tz else None
        return self._json("POST", f"/v1/studies/{study}/participants/{participant}/nights", content=content,
                          params=params, headers={"Content-Type": FORMAT_MEDIA_TYPES[fmt]})

    def push_file(self, study: str, participant: str, path: str | Path, *, tz: str | None = None) -> dict[str, Any]:
        """Store a night file (format from its suffix: .json, .csv or .parquet)."""
        path = Path(path)
        fmt = path.suffix.lower().lstrip(".")
        if fmt not in FORMAT_MEDIA_TYPES:
            raise BadRequest(f"{path.name}: unknown night file type {path.suffix!r}; use .json, .csv or .parquet")
        return self.post_night(study, participant, path.read_bytes(), fmt=fmt, tz=tz)

    def delete_participant(self, study: str, participant: str) -> dict[str, int]:
        return self._json("DELETE", f"/v1/studies/{study}/participants/{participant}")

    # ---- training and jobs ----------------------------------------------------------------
    @staticmethod
    def _training_body(n_trials: int | None, seed: int | None) -> dict[str, Any]:
        return {k: v for k, v in (("n_trials", n_trials), ("seed", seed)) if v is not None}

    def train_personal(self, study: str, participant: str, *, n_trials: int | None = None,
                       seed: int | None = None) -> dict[str, Any]:
        return self._json("POST", f"/v1/studies/{study}/participants/{participant}/training",
                          json=self._training_body(n_trials, seed))

    def train_pooled(self, study: str, *, n_trials: int | None = None, seed: int | None = None) -> dict[str, Any]:
        return self._json("POST", f"/v1/studies/{study}/pooled/training", json=self._training_body(n_trials, seed))

    def get_job(self, job_id: str) -> dict[str, Any]:
        return self._json("GET", f"/v1/jobs/{job_id}")

    def cancel_job(self, job_id: str) -> dict[str, Any]:
        return self._json("POST", f"/v1/jobs/{job_id}/cancel")

    def wait_for_job(self, job_id: str, *, poll_s: float = 0.5, timeout_s: float | None = None,
                     on_progress: Callable[[dict[str, Any]], None] | None = None) -> dict[str, Any]:
        """Poll a job until it finishes; returns its final state (check ``state`` and ``error``)."""
        deadline = None if timeout_s is None else time.monotonic() + timeout_s
        while True:
            job = self.get_job(job_id)
            if on_progress is not None:
                on_progress(job)
            if job["state"] in ("succeeded", "failed", "cancelled"):
                return job
            if deadline is not None and time.monotonic() > deadline:
                raise TimeoutError(f"job {job_id} still {job['state']} after {timeout_s} s")
            time.sleep(poll_s)

    # ---- models -----------------------------------------------------------------------------
    def list_models(self, study: str, participant: str | None = None) -> list[dict[str, Any]]:
        """Model versions of a participant, or the study's pooled versions (``participant=None``)."""
        owner = "pooled" if participant is None else f"participants/{participant}"
        return self._json("GET", f"/v1/studies/{study}/{owner}/models")

    def activate_model(self, study: str, version: int, participant: str | None = None) -> dict[str, Any]:
        owner = "pooled" if participant is None else f"participants/{participant}"
        return self._json("POST", f"/v1/studies/{study}/{owner}/models/{version}/activate")

    # ---- scoring and reports ----------------------------------------------------------------
    def score(self, study: str, participant: str, night_id: str, *, method: str = "auto",
              version: int | None = None) -> dict[str, Any]:
        params: dict[str, Any] = {"method": method}
        if version is not None:
            params["version"] = version
        return self._json("GET", f"/v1/studies/{study}/participants/{participant}/nights/{night_id}/scoring",
                          params=params)

    def participant_comparison(self, study: str, participant: str) -> dict[str, Any]:
        return self._json("GET", f"/v1/studies/{study}/participants/{participant}/comparison")

    def study_comparison(self, study: str) -> dict[str, Any]:
        return self._json("GET", f"/v1/studies/{study}/comparison")

    def export_parameters(self, study: str, *, fmt: str = "csv") -> bytes:
        return self._request("GET", f"/v1/studies/{study}/exports/parameters", params={"format": fmt},
                             timeout=600).content

    # ---- tokens and operations --------------------------------------------------------------
    def create_token(self, role: str, *, study_id: str | None = None, label: str | None = None) -> dict[str, Any]:
        return self._json("POST", "/v1/tokens", json={"role": role, "study_id": study_id, "label": label})

    def list_tokens(self) -> list[dict[str, Any]]:
        return self._json("GET", "/v1/tokens")

    def revoke_token(self, token_id: str) -> dict[str, Any]:
        return self._json("DELETE", f"/v1/tokens/{token_id}")

    def metrics(self) -> str:
        return self._request("GET", "/metrics").text
