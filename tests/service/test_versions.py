"""Registry of model versions: numbering, promotion rule, activation (real SQLite database)."""

from __future__ import annotations

import json

import pytest


def _add(session, study, participant, score):
    from service.store import versions
    from service.store.metadata import ModelMetadata, Selection

    metadata = ModelMetadata(selection=Selection(metric="balanced_accuracy", value=score))
    return versions.add_version(session, study=study, participant=participant, booster=b"raw", model_meta={},
                                metadata=metadata, job_id=None, actor="test")


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
    from service.errors import NotFound
    from service.store import db, registry, versions
    from service.store.audit import list_audit

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


#: A pooled version's ``info`` column as the service stored it before metadata was typed (keys as
#: written by the training job then, plus one no reader knows).
_STORED_POOLED_INFO = {
    "metrics": {"n_nights": 4, "balanced_accuracy": {"mean": 0.75, "sd": 0.05}, "auc": {"mean": None, "sd": None}},
    "selection": {"metric": "balanced_accuracy", "value": 0.75},
    "training_nights": [{"participant_id": "p", "night_id": "abc", "content_hash": "abc" * 20, "label": "n1"}],
    "training_hashes": ["abc" * 20], "feature_set_version": "f-30s", "hyperparameters": {"max_depth": 3},
    "threshold": 0.42, "library_versions": {"xgboost": "3.2.0"}, "config": {"n_trials": 2, "seed": 0},
    "night_metrics": [{"participant_id": "p", "night_id": "abc", "method": "pooled", "balanced_accuracy": 0.75}],
    "offset": None, "participants": ["p"], "offsets": {"p": -0.3}, "offset_shrinkage": 0.5,
    "descriptors": {"p": {"median_count": 12.0}}, "retired_key": {"anything": 1},
}


def test_metadata_of_rows_stored_before_reads_as_attributes(owners) -> None:
    from service.store import db, registry, versions

    with db.session_scope(owners, write=True) as session:
        study = registry.find_study(session, "s")
        session.add(db.ModelVersion(uid="0" * 32, study_pk=study.pk, participant_pk=None, scope="pooled", kind="pooled",
                                    version=1, is_active=True, booster=b"raw", model_meta={},
                                    info=_STORED_POOLED_INFO, created_at=db.utcnow()))
    with db.session_scope(owners) as session:
        meta = versions.get_version(session, study=registry.find_study(session, "s"), participant=None,
                                    version=1).metadata
    assert meta.metrics.n_nights == 4 and meta.metrics.mean("balanced_accuracy") == 0.75
    assert meta.metrics.mean("auc") is None and meta.selection_score == 0.75 and meta.threshold == 0.42
    assert meta.training_nights[0].label == "n1" and meta.training_hashes == ("abc" * 20,)
    assert meta.offset_of("p") == -0.3 and meta.offset_of("someone-else") == 0.0
    assert meta.participants == ("p",) and meta.descriptors["p"] == {"median_count": 12.0}
    assert meta.flagged_nights == ()  # stored before flagged training nights were recorded: none known
    # the stored form keeps its keys: what is written reads back the same (JSON, as the column holds it)
    assert json.loads(json.dumps(meta.to_json())) == {k: v for k, v in _STORED_POOLED_INFO.items()
                                                      if k != "retired_key"} | {"metrics_with_offset": None,
                                                                                "flagged_nights": [],
                                                                                "offset_rule": None, "activation": None,
                                                                                "corrected_nights": 0,
                                                                                "correction_weight": None,
                                                                                "removed_held_out_nights": []}


def test_flagged_training_nights_read_back_from_their_stored_form(owners) -> None:
    from service.store import db, registry, versions

    flagged = [{"participant_id": "p", "night_id": "abc", "codes": ["reference_implausible"]}]
    with db.session_scope(owners, write=True) as session:
        study = registry.find_study(session, "s")
        session.add(db.ModelVersion(uid="1" * 32, study_pk=study.pk, participant_pk=None, scope="pooled", kind="pooled",
                                    version=1, is_active=True, booster=b"raw", model_meta={},
                                    info=_STORED_POOLED_INFO | {"flagged_nights": flagged}, created_at=db.utcnow()))
    with db.session_scope(owners) as session:
        meta = versions.get_version(session, study=registry.find_study(session, "s"), participant=None,
                                    version=1).metadata
    (night,) = meta.flagged_nights
    assert (night.participant_id, night.night_id, night.codes, night.label) == ("p", "abc",
                                                                                ("reference_implausible",), None)
    assert json.loads(json.dumps(meta.to_json()))["flagged_nights"] == [flagged[0] | {"label": None}]


def test_metadata_missing_keys_take_their_defaults() -> None:
    from service.store.metadata import ModelMetadata

    meta = ModelMetadata.from_json({"selection": {"metric": "balanced_accuracy", "value": None}})
    assert meta.selection_score is None and meta.threshold is None and meta.training_nights == ()
    assert meta.metrics.n_nights == 0 and meta.metrics.as_dict() == {"n_nights": 0}
    assert ModelMetadata.from_json(None) == ModelMetadata()


def test_lookups_return_snapshots_and_changes_go_through_the_store(owners) -> None:
    import dataclasses

    from service.store import db, registry

    with db.session_scope(owners, write=True) as session:
        study = registry.find_study(session, "s")
        p = registry.find_participant(session, study, "p")
        assert not isinstance(p, db.Base) and not isinstance(study, db.Base)
        with pytest.raises(dataclasses.FrozenInstanceError):
            p.chosen_method = "personal"  # type: ignore[misc]
        changed = registry.record_choice(session, participant=p, method="pooled",
                                         choice={"method": "pooled", "reason": "test"})
        assert changed.chosen_method == "pooled" and p.chosen_method is None
    with db.session_scope(owners) as session:
        again = registry.find_participant(session, registry.find_study(session, "s"), "p")
        assert (again.chosen_method, again.choice) == ("pooled", {"method": "pooled", "reason": "test"})
        assert [q.participant_id for q in registry.study_participants(session, study=study)] == ["p"]


def test_numbers_are_not_given_out_again_after_a_participant_is_deleted(owners) -> None:
    from factories import make_night

    from service.store import db, manage, registry, versions
    from service.store.metadata import ModelMetadata

    with db.session_scope(owners, write=True) as session:
        study = registry.find_study(session, "s")
        p = registry.find_participant(session, study, "p")
        assert [_add(session, study, p, 0.8).version for _ in range(3)] == [1, 2, 3]
        pooled = versions.add_version(session, study=study, participant=None, booster=b"raw", model_meta={},
                                      metadata=ModelMetadata(participants=("p",)), job_id=None, actor="test")
        assert pooled.version == 1
        manage.delete_participant(session, study_id="s", participant_id="p", actor="test")
        registry.ingest_night(session, study_id="s", night=make_night(240, participant_id="p"), source_format="json",
                              actor="test")
        again = registry.find_participant(session, study, "p")  # a new row (SQLite may even give it the old key)
        assert _add(session, study, again, 0.8).version == 4
        assert versions.list_versions(session, study=study, participant=None) == []  # it was trained on p
        assert _add(session, study, None, 0.8).version == 2


def test_a_rolled_back_version_leaves_its_number_unused(owners) -> None:
    from service.store import db, registry

    with pytest.raises(RuntimeError), db.session_scope(owners, write=True) as session:
        study = registry.find_study(session, "s")
        assert _add(session, study, None, 0.8).version == 1
        raise RuntimeError("the job failed after storing")
    with db.session_scope(owners, write=True) as session:
        assert _add(session, registry.find_study(session, "s"), None, 0.8).version == 1


def test_a_deleted_night_marks_a_version_only_when_no_copy_is_stored(owners) -> None:
    from factories import make_night

    from service.store import db, manage, registry, versions
    from service.store.metadata import ModelMetadata, TrainingNight

    night = make_night(240, participant_id="q", seed=4, start="2031-05-02T22:41:00+01:00")
    with db.session_scope(owners, write=True) as session:
        for pid in ("q", "r"):
            copy = make_night(240, participant_id=pid, seed=4, start="2031-05-02T22:41:00+01:00")
            registry.ingest_night(session, study_id="s", night=copy, source_format="json", actor="test",
                                  allow_duplicate=True)
        study = registry.find_study(session, "s")
        trained = TrainingNight(participant_id="q", night_id=night.night_id, content_hash=night.content_hash)
        versions.add_version(session, study=study, participant=None, booster=b"raw", model_meta={},
                             metadata=ModelMetadata(training_nights=(trained,), training_hashes=(night.content_hash,)),
                             job_id=None, actor="test")
        first = manage.delete_night(session, study_id="s", participant_id="q", night_id=night.night_id, actor="t")
        assert first["marked_versions"] == []  # participant r still has the content
        last = manage.delete_night(session, study_id="s", participant_id="r", night_id=night.night_id, actor="t")
        assert last["marked_versions"] == [{"kind": "pooled", "participant_id": None, "version": 1}]
        stored = versions.get_version(session, study=study, participant=None, version=1)
        assert stored.trained_on_deleted_nights == (night.night_id,)
        # a version stored after its training night was deleted is marked when it is stored
        late = versions.add_version(session, study=study, participant=None, booster=b"raw", model_meta={},
                                    metadata=ModelMetadata(training_nights=(trained,)), job_id=None, actor="test")
        assert late.version == 2 and late.trained_on_deleted_nights == (night.night_id,)


@pytest.mark.parametrize("backend", ["sqlite", pytest.param("postgres", marks=pytest.mark.postgres)])
def test_concurrent_versions_of_one_scope_get_different_numbers(backend: str, tmp_path) -> None:
    import threading
    from contextlib import ExitStack

    from service.config import Settings
    from service.store import db, registry
    from service.store.schema import upgrade

    with ExitStack() as stack:
        if backend == "sqlite":
            url = f"sqlite:///{tmp_path / 'v.db'}"
        else:
            from pg_support import throwaway_database

            url = stack.enter_context(throwaway_database())
        settings = Settings(db=url)
        upgrade(settings)
        engine = db.make_engine(settings)
        stack.callback(engine.dispose)
        factory = db.make_session_factory(engine)
        with db.session_scope(factory, write=True) as session:
            registry.create_study(session, study_id="s", name="S", actor="test")
        barrier, numbers = threading.Barrier(8), []

        def add() -> None:
            barrier.wait()
            with db.session_scope(factory, write=True) as session:
                numbers.append(_add(session, registry.find_study(session, "s"), None, 0.5).version)

        threads = [threading.Thread(target=add) for _ in range(8)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(60)
        assert sorted(numbers) == list(range(1, 9))
