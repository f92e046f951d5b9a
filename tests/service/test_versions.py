"""Registry of model versions: numbering, promotion rule, activation (real SQLite database)."""

from __future__ import annotations

import pytest


def _add(session, study, participant, score):
    from service.store import versions

    info = {"selection": {"metric": "balanced_accuracy", "value": score}}
    return versions.add_version(session, study=study, participant=participant, booster=b"raw", model_meta={},
                                info=info, job_id=None, actor="test")


@pytest.fixture
def owners(factory):
    """A study with one participant (rows created through the registry)."""
    from factories import make_night

    from service.store import db, registry

    with db.session_scope(factory, write=True) as session:
        registry.create_study(session, study_id="s", name="S", actor="test")
        registry.ingest_night(session, study_id="s", night=make_night(240, participant_id="p"), source_format="json",
                              actor="test")
    return factory


def test_versions_are_numbered_per_scope_and_promoted_only_when_not_worse(owners) -> None:
    from service.store import db, registry, versions

    with db.session_scope(owners, write=True) as session:
        study = registry.find_study(session, "s")
        p = registry.find_participant(session, study, "p")
        steps = [(0.80, True), (0.70, False), (0.80, True), (float("nan"), False), (0.81, True)]
        for number, (score, promoted) in enumerate(steps, start=1):
            v = _add(session, study, p, score)
            assert (v.version, v.active) == (number, promoted)
        pooled = _add(session, study, None, 0.5)
        assert (pooled.version, pooled.active, pooled.kind) == (1, True, "pooled")
        listed = versions.list_versions(session, study=study, participant=p)
        assert [v.version for v in listed] == [5, 4, 3, 2, 1]
        assert [v.version for v in listed if v.active] == [5]


def test_activation_rolls_back_and_is_audited(owners) -> None:
    from service.store import db, registry, versions
    from service.store.audit import list_audit
    from service.errors import NotFound

    with db.session_scope(owners, write=True) as session:
        study = registry.find_study(session, "s")
        p = registry.find_participant(session, study, "p")
        _add(session, study, p, 0.8)
        _add(session, study, p, 0.9)
        versions.activate_version(session, study=study, participant=p, version=1, actor="admin-token")
        assert versions.active_version(session, study=study, participant=p).version == 1
        entry = next(e for e in list_audit(session) if e.action == "model.activate")
        assert entry.actor == "admin-token" and entry.detail == {"version": 1, "previous_active": 2}
        with pytest.raises(NotFound, match="no model version 7"):
            versions.activate_version(session, study=study, participant=p, version=7, actor="x")
