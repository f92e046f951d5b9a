"""Continuous-recording methods of :class:`service.client.NightbankClient` (a mixin over its request helpers)."""

from __future__ import annotations

import json
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

from .client_base import ClientCalls
from .errors import BadRequest

__all__ = ["RecordingMethods"]

_MEDIA = {"json": "application/json", "csv": "text/csv", "parquet": "application/vnd.apache.parquet"}


def _content(data: bytes | Mapping[str, Any] | list[Any]) -> bytes:
    return data if isinstance(data, bytes) else json.dumps(data).encode()


def _format(path: Path, allowed: tuple[str, ...]) -> str:
    fmt = path.suffix.lower().lstrip(".")
    if fmt not in allowed:
        raise BadRequest(f"{path.name}: unknown file type {path.suffix!r}; use " + ", ".join(f".{a}" for a in allowed))
    return fmt


class RecordingMethods(ClientCalls):
    """Recordings, diaries, PSG references and day tables (mixed into the client)."""

    @staticmethod
    def _recordings_url(study: str, participant: str, recording_id: str | None = None) -> str:
        base = f"/v1/studies/{study}/participants/{participant}/recordings"
        return base if recording_id is None else f"{base}/{recording_id}"

    def post_recording(self, study: str, participant: str, data: bytes | Mapping[str, Any], *, fmt: str = "json",
                       tz: str | None = None, profile: str | None = None, source_name: str | None = None,
                       allow_overlap: bool = False, allow_duplicate: bool = False) -> dict[str, Any]:
        """Store a continuous recording (days to weeks) in one upload.

        Returns
        -------
        answer : dict
            ``recording_id``, ``created``, ``start``, ``end``, ``epoch_seconds``, ``n_epochs`` and
            ``periods`` (each main period's ``night_id``).
        """
        params = {k: v for k, v in (("tz", tz), ("profile", profile), ("source_name", source_name)) if v}
        for name, on in (("allow_overlap", allow_overlap), ("allow_duplicate", allow_duplicate)):
            if on:
                params[name] = "true"
        return self._json("POST", self._recordings_url(study, participant), content=_content(data),
                          params=params or None, headers={"Content-Type": _MEDIA[fmt]}, timeout=600)

    def push_recording(self, study: str, participant: str, path: str | Path, **options: Any) -> dict[str, Any]:
        """Store a recording file (.csv, .json or .parquet); options as :meth:`post_recording`."""
        path = Path(path)
        fmt = _format(path, ("csv", "json", "parquet"))
        return self.post_recording(study, participant, path.read_bytes(), fmt=fmt,
                                   source_name=options.pop("source_name", path.name), **options)

    def list_recordings(self, study: str, participant: str) -> list[dict[str, Any]]:
        return list(self._pages(self._recordings_url(study, participant)))

    def get_recording(self, study: str, participant: str, recording_id: str) -> dict[str, Any]:
        return self._json("GET", self._recordings_url(study, participant, recording_id))

    def delete_recording(self, study: str, participant: str, recording_id: str) -> dict[str, Any]:
        """Remove a recording and its nights (admin)."""
        return self._json("DELETE", self._recordings_url(study, participant, recording_id))

    def post_diary(self, study: str, participant: str, recording_id: str, data: bytes | list[Any] | dict[str, Any],
                   *, fmt: str = "csv", tz: str | None = None) -> dict[str, Any]:
        """Store (replace) a recording's diary; its periods and nights are recomputed."""
        return self._json("POST", self._recordings_url(study, participant, recording_id) + "/diary",
                          content=_content(data), params={"tz": tz} if tz else None,
                          headers={"Content-Type": _MEDIA[fmt]})

    def post_reference(self, study: str, participant: str, recording_id: str, data: bytes | dict[str, Any], *,
                       fmt: str = "csv", tz: str | None = None, profile: str | None = None,
                       clock_offset_s: float | None = None, accept_implausible: bool = False) -> dict[str, Any]:
        """Align a PSG hypnogram to the recording and label the night it covers.

        Returns
        -------
        answer : dict
            ``night_id``, ``clock_offset_s`` (seconds added to the PSG clock), ``alignment_quality``.

        Raises
        ------
        Unprocessable
            Code ``alignment_weak`` or ``alignment_at_edge`` unless ``clock_offset_s`` is given.
        """
        params: dict[str, str] = {k: v for k, v in (("tz", tz), ("profile", profile)) if v}
        if clock_offset_s is not None:
            params["clock_offset_s"] = repr(float(clock_offset_s))
        if accept_implausible:
            params["accept_implausible"] = "true"
        return self._json("POST", self._recordings_url(study, participant, recording_id) + "/reference",
                          content=_content(data), params=params or None, headers={"Content-Type": _MEDIA[fmt]})

    def push_diary(self, study: str, participant: str, recording_id: str, path: str | Path,
                   **options: Any) -> dict[str, Any]:
        path = Path(path)
        return self.post_diary(study, participant, recording_id, path.read_bytes(),
                               fmt=_format(path, ("csv", "json")), **options)

    def push_reference(self, study: str, participant: str, recording_id: str, path: str | Path,
                       **options: Any) -> dict[str, Any]:
        path = Path(path)
        return self.post_reference(study, participant, recording_id, path.read_bytes(),
                                   fmt=_format(path, ("csv", "json")), **options)

    def recording_periods(self, study: str, participant: str, recording_id: str) -> list[dict[str, Any]]:
        return list(self._json("GET", self._recordings_url(study, participant, recording_id) + "/periods")["items"])

    def recording_nonwear(self, study: str, participant: str, recording_id: str) -> list[dict[str, Any]]:
        return list(self._json("GET", self._recordings_url(study, participant, recording_id) + "/nonwear")["items"])

    def recording_days(self, study: str, participant: str, recording_id: str, *, method: str = "auto",
                       day_start: str = "noon") -> dict[str, Any]:
        """The recording's day table: ``rows``, ``summary`` and ``definitions``."""
        return self._json("GET", self._recordings_url(study, participant, recording_id) + "/days",
                          params={"method": method, "day_start": day_start}, timeout=600)

    def export_days(self, study: str, *, fmt: str = "csv", method: str = "auto",
                    participant: str | None = None,
                    progress: Callable[[int, int | None], None] | None = None) -> bytes:
        """Every recording's day rows of the study (or of one participant), CSV or Parquet bytes.

        Streamed like :meth:`~service.client.NightbankClient.export_parameters` (the timeout is the
        longest wait between chunks); ``progress(rows_received, None)`` follows a CSV export.
        """
        params = {"format": fmt, "method": method} | ({"participant": participant} if participant else {})
        return self._download(f"/v1/studies/{study}/exports/days", params=params, total_header=None,
                              progress=progress)
