"""A small HTTP client of the nightbank API for lab-server scripts.

Problem responses come back as the same typed errors the server raised: :class:`NotFound`,
:class:`Forbidden`, :class:`Unauthorized`, :class:`Conflict`, :class:`Unprocessable`,
:class:`~models.InvalidNightError` and so on, with the server's ``code``. Each carries
``problem``, the server's problem details as sent (``code``, ``detail``, ``problems``,
``request_id``), ``status``, the HTTP status, and ``problems``, a list of :class:`models.Problem`
objects (``code``, ``message``, ``location`` with ``field``, ``row``, ``epoch`` or ``time``), one per
problem the server listed (empty when it listed none). An invalid night is an
:class:`~models.InvalidNightError` whose ``problems`` name every defect and where it is; a night
refused for what is stored already is a :class:`Conflict` with code ``duplicate_night`` or
``overlapping_night``; a reference the server finds implausible is an :class:`Unprocessable` with
code ``reference_implausible``. A server that cannot be reached gives a :class:`ServiceError` with
code ``server_unreachable``.

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
from collections.abc import Callable, Iterator, Mapping
from enum import Enum
from pathlib import Path
from typing import Any, Final, Literal

import httpx

from .client_errors import problem_error
from .client_recordings import RecordingMethods
from .client_reviews import ReviewMethods
from .client_stream import Progress, download
from .errors import BadRequest, ServiceError

__all__ = ["FORMAT_MEDIA_TYPES", "KEEP", "NightbankClient", "Progress", "problem_error"]

#: night file format -> content type of the ingest request
FORMAT_MEDIA_TYPES = {"json": "application/json", "csv": "text/csv", "parquet": "application/vnd.apache.parquet"}
#: the epoch length a study gets when none is given, seconds
DEFAULT_EPOCH_SECONDS = 30


class _Keep(Enum):
    KEEP = "keep"


#: "leave this field as it is" in :meth:`NightbankClient.update_night` (None there clears a label)
KEEP: Final = _Keep.KEEP


def _flags(**flags: bool) -> dict[str, str]:
    """Query parameters of the boolean options that are on (an option left off is not sent)."""
    return {name: "true" for name, on in flags.items() if on}


class NightbankClient(RecordingMethods, ReviewMethods):
    """Client of one nightbank server.

    Parameters
    ----------
    base_url : str
        E.g. ``http://127.0.0.1:8765``.
    token : str
        Bearer token (``nightbank token create``).
    timeout_s : float, default=60.0
        Per-request timeout, seconds; for streamed exports, the longest wait between two chunks.
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
        try:
            response = self._http.request(method, url, **kwargs)
        except httpx.TransportError as exc:
            raise ServiceError(f"cannot reach the server at {self.base_url}: {exc or type(exc).__name__}",
                               code="server_unreachable") from None
        if response.is_error:
            raise problem_error(response)
        return response

    def _json(self, method: str, url: str, **kwargs: Any) -> Any:
        return self._request(method, url, **kwargs).json()

    def _download(self, url: str, *, params: Mapping[str, Any], total_header: str | None,
                  progress: Progress | None = None) -> bytes:
        return download(self._http, url, params=params, total_header=total_header, progress=progress)

    # ---- studies, participants, nights ----------------------------------------------------
    def health(self) -> dict[str, Any]:
        return self._json("GET", "/healthz")

    def create_study(self, study_id: str, name: str, *, epoch_seconds: int = DEFAULT_EPOCH_SECONDS) -> dict[str, Any]:
        """Create a study.

        Parameters
        ----------
        study_id : str
            Letters, digits, ``_ . -``.
        name : str
            Display name.
        epoch_seconds : int, default=30
            Epoch length of the study's nights, seconds. Sent only when it is not the default, so a
            server without the option still creates studies with 30-s epochs.
        """
        body: dict[str, Any] = {"study_id": study_id, "name": name}
        if epoch_seconds != DEFAULT_EPOCH_SECONDS:
            body["epoch_seconds"] = epoch_seconds
        return self._json("POST", "/v1/studies", json=body)

    def list_studies(self) -> list[dict[str, Any]]:
        return self._json("GET", "/v1/studies")

    def _pages(self, url: str, page_size: int = 500, params: Mapping[str, Any] | None = None
               ) -> Iterator[dict[str, Any]]:
        offset = 0
        while True:
            page = self._json("GET", url, params={**(params or {}), "limit": page_size, "offset": offset})
            yield from page["data"]
            offset += len(page["data"])
            if not page["data"] or offset >= page["count"]:
                return

    def list_participants(self, study: str) -> list[dict[str, Any]]:
        return list(self._pages(f"/v1/studies/{study}/participants"))

    def list_nights(self, study: str, participant: str) -> list[dict[str, Any]]:
        return list(self._pages(f"/v1/studies/{study}/participants/{participant}/nights"))

    def _night_url(self, study: str, participant: str, night_id: str) -> str:
        return f"/v1/studies/{study}/participants/{participant}/nights/{night_id}"

    def get_night(self, study: str, participant: str, night_id: str, *, epochs: bool = False) -> dict[str, Any]:
        """A night's metadata, QC flags and state.

        Parameters
        ----------
        epochs : bool, default=False
            Also return the epochs: ``epoch_seconds``, ``counts`` (n_epochs,) and ``reference``
            (n_epochs,) stage codes, or None for a night without reference.
        """
        params = _flags(epochs=epochs) or None
        return self._json("GET", self._night_url(study, participant, night_id), params=params)

    def delete_night(self, study: str, participant: str, night_id: str) -> dict[str, Any]:
        """Remove one night with its derived data (features, cached scorings); returns the server's summary."""
        return self._json("DELETE", self._night_url(study, participant, night_id))

    def update_night(self, study: str, participant: str, night_id: str, *,
                     label: str | None | Literal[_Keep.KEEP] = KEEP, excluded: bool | None = None) -> dict[str, Any]:
        """Change a stored night's label or whether training leaves it out; returns the night.

        Parameters
        ----------
        label : str or None, default=KEEP
            New label; None removes the label; :data:`KEEP` leaves it as it is.
        excluded : bool, optional
            True leaves the night out of training, False takes it in again; None leaves it as it is.
        """
        body: dict[str, Any] = {}
        if label is not KEEP:
            body["label"] = label
        if excluded is not None:
            body["excluded"] = excluded
        if not body:
            raise BadRequest("give a label or excluded to change", code="nothing_to_change")
        return self._json("PATCH", self._night_url(study, participant, night_id), json=body)

    def post_night(self, study: str, participant: str, data: bytes | dict[str, Any], *, fmt: str = "json",
                   tz: str | None = None, profile: str | None = None, allow_duplicate: bool = False,
                   allow_overlap: bool = False, accept_implausible: bool = False) -> dict[str, Any]:
        """Store a night.

        Parameters
        ----------
        data : bytes or dict
            A nightbank JSON object, or file bytes in ``fmt``.
        fmt : {"json", "csv", "parquet"}, default="json"
        tz : str, optional
            IANA zone of times written without UTC offset.
        profile : str, optional
            Name of an import profile saved in the study, applied to the file.
        allow_duplicate : bool, default=False
            Store the night although the participant has a night of the same recording already
            (otherwise: :class:`Conflict` with code ``duplicate_night``).
        allow_overlap : bool, default=False
            Store the night although its time overlaps a stored night of the participant
            (otherwise: :class:`Conflict` with code ``overlapping_night``).
        accept_implausible : bool, default=False
            Store the night although its reference looks implausible (otherwise: :class:`Unprocessable`
            with code ``reference_implausible``).

        Returns
        -------
        answer : dict
            ``night_id``, ``created`` (False when the same content was stored before), ``qc`` (flags)
            and, from servers that report it, ``unused_columns`` (list of str).

        Raises
        ------
        InvalidNightError
            ``problems``: every defect, as :class:`models.Problem` objects naming where it is.
        """
        content = json.dumps(data).encode() if isinstance(data, dict) else data
        params: dict[str, str] = {"tz": tz} if tz else {}
        if profile:
            params["profile"] = profile
        params |= _flags(allow_duplicate=allow_duplicate, allow_overlap=allow_overlap,
                         accept_implausible=accept_implausible)
        return self._json("POST", f"/v1/studies/{study}/participants/{participant}/nights", content=content,
                          params=params or None, headers={"Content-Type": FORMAT_MEDIA_TYPES[fmt]})

    def push_file(self, study: str, participant: str, path: str | Path, *, tz: str | None = None,
                  profile: str | None = None, allow_duplicate: bool = False, allow_overlap: bool = False,
                  accept_implausible: bool = False) -> dict[str, Any]:
        """Store a night file (format from its suffix: .json, .csv or .parquet); options as :meth:`post_night`."""
        path = Path(path)
        fmt = path.suffix.lower().lstrip(".")
        if fmt not in FORMAT_MEDIA_TYPES:
            raise BadRequest(f"{path.name}: unknown night file type {path.suffix!r}; use .json, .csv or .parquet")
        return self.post_night(study, participant, path.read_bytes(), fmt=fmt, tz=tz, profile=profile,
                               allow_duplicate=allow_duplicate, allow_overlap=allow_overlap,
                               accept_implausible=accept_implausible)

    def rename_participant(self, study: str, participant: str, to: str) -> dict[str, Any]:
        """Give a participant a new id (nights, models and jobs follow); returns the server's answer."""
        return self._json("POST", f"/v1/studies/{study}/participants/{participant}/rename", json={"to": to})

    def delete_participant(self, study: str, participant: str) -> dict[str, int]:
        return self._json("DELETE", f"/v1/studies/{study}/participants/{participant}")

    # ---- import profiles --------------------------------------------------------------------
    def create_profile(self, study: str, profile: Mapping[str, Any], *, replace: bool = False) -> dict[str, Any]:
        """Save an import profile in a study.

        Parameters
        ----------
        profile : dict
            The profile's JSON form (:meth:`models.ImportProfile.to_dict`), ``name`` included.
        replace : bool, default=False
            Replace a saved profile of the same name (otherwise: :class:`Conflict`).
        """
        return self._json("POST", f"/v1/studies/{study}/import-profiles", json=dict(profile),
                          params=_flags(replace=replace) or None)

    def list_profiles(self, study: str) -> list[dict[str, Any]]:
        """The study's saved import profiles (every page)."""
        url = f"/v1/studies/{study}/import-profiles"
        first = self._json("GET", url)
        if isinstance(first, list):
            return first
        if len(first["data"]) >= first["count"]:
            return list(first["data"])
        return list(self._pages(url))

    def get_profile(self, study: str, name: str) -> dict[str, Any]:
        """One saved import profile (its JSON form)."""
        return self._json("GET", f"/v1/studies/{study}/import-profiles/{name}")

    def delete_profile(self, study: str, name: str) -> dict[str, Any]:
        return self._json("DELETE", f"/v1/studies/{study}/import-profiles/{name}")

    def guess_profile(self, study: str, data: bytes) -> dict[str, Any]:
        """Propose an import profile for a CSV export.

        Parameters
        ----------
        data : bytes
            The file as it is.

        Returns
        -------
        guess : dict
            ``profile`` (JSON form), ``preview`` (the first rows as parsed with it), ``notes``
            (list of str) and ``stage_codes_found`` (the reference's own codes).
        """
        return self._json("POST", f"/v1/studies/{study}/import-profiles/guess", content=data,
                          headers={"Content-Type": "text/csv"})

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

    def list_jobs(self, study: str, *, state: str | None = None) -> list[dict[str, Any]]:
        """The study's jobs, every page.

        Parameters
        ----------
        state : {"queued", "running", "succeeded", "failed", "cancelled"}, optional
            Only jobs in this state; every job when None.
        """
        return list(self._pages(f"/v1/studies/{study}/jobs", params={"state": state} if state else None))

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

    def export_parameters(self, study: str, *, fmt: str = "csv", interval_level: float | None = None,
                          progress: Progress | None = None) -> bytes:
        """Every night's and method's sleep parameters (CSV or Parquet bytes; intervals at ``interval_level``, None:
        the protocol's), streamed (the timeout is the longest wait between chunks); ``progress(rows, total)``."""
        params = {"format": fmt} | ({} if interval_level is None else {"interval_level": interval_level})
        return self._download(f"/v1/studies/{study}/exports/parameters", params=params,
                              total_header="X-Export-Rows", progress=progress)

    def get_protocol(self, study: str) -> dict[str, Any]:
        """The study's protocol (``protocol``, ``fingerprint``, ``is_default``, ``updated_at``, ``updated_by``)."""
        return self._json("GET", f"/v1/studies/{study}/protocol")

    def set_protocol(self, study: str, protocol: Mapping[str, Any]) -> dict[str, Any]:
        """Set the study's protocol (fields left out take their defaults); answers as :meth:`get_protocol`."""
        return self._json("PUT", f"/v1/studies/{study}/protocol", json=dict(protocol))

    def study_report(self, study: str, *, fmt: Literal["html", "pdf"] = "html") -> bytes:
        """The study's validation report: one self-contained HTML page, or its tables and figures as a PDF."""
        path = f"/v1/studies/{study}/report" + (".pdf" if fmt == "pdf" else "")
        return self._request("GET", path, timeout=600).content

    # ---- tokens and operations --------------------------------------------------------------
    def create_token(self, role: str, *, study_id: str | None = None, label: str | None = None) -> dict[str, Any]:
        return self._json("POST", "/v1/tokens", json={"role": role, "study_id": study_id, "label": label})

    def list_tokens(self) -> list[dict[str, Any]]:
        return self._json("GET", "/v1/tokens")

    def revoke_token(self, token_id: str) -> dict[str, Any]:
        return self._json("DELETE", f"/v1/tokens/{token_id}")

    def metrics(self) -> str:
        return self._request("GET", "/metrics").text
