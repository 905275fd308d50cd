"""Studies in the store: create, attach with conditions, read back; failed requests change nothing.

Runs on SQLite and, with RAMIFORM_TEST_DATABASE_URL set, on PostgreSQL (the ``store`` fixture).
"""

from __future__ import annotations

import pytest

from service.store import StudyStore, UnknownSpecimenError
from service.study import ConditionError, parse_conditions


def _analysis(i: int) -> dict:
    return {"source": {"sha256": f"{i:064x}"}, "features": {"box_dimension": {"value": 1.5 + i / 10}}}


def _snapshot(studies: StudyStore, study_id: str) -> list:
    return [(record.id, {n: c.to_dict() for n, c in conditions.items()})
            for record, conditions in studies.members(study_id)]


def test_a_study_keeps_its_members_in_order_with_their_conditions(store):
    studies = StudyStore(store.engine)
    specimens = [store.add(_analysis(i), {"a.png": b"x"}, label=f"dish {i}") for i in range(3)]
    study = studies.create("voltage series", "copper sulfate, 0.1 M")
    assert studies.attach(study.id, [(specimens[2].id, parse_conditions({"voltage": "4 V"})),
                                     (specimens[0].id, parse_conditions({"voltage": "1500 mV", "electrolyte": "CuSO4"}))])
    members = studies.members(study.id)
    assert [record.id for record, _ in members] == [specimens[2].id, specimens[0].id]
    first = members[1][1]
    # 1500 mV is 1.5 V exactly (SI prefixes), kept as written and on the canonical axis
    assert (first["voltage"].value, first["voltage"].unit, first["voltage"].canonical_value) == (1500.0, "mV", 1.5)
    assert first["electrolyte"].value == "CuSO4"
    assert studies.get(study.id).n_specimens == 2
    assert [s.id for s in studies.list()] == [study.id]

    # attaching again adds the new specimen at the end and merges conditions of the old one
    assert studies.attach(study.id, [(specimens[1].id, None), (specimens[0].id, parse_conditions({"voltage": "2 V"}))])
    members = studies.members(study.id)
    assert [record.id for record, _ in members] == [specimens[2].id, specimens[0].id, specimens[1].id]
    assert members[1][1]["voltage"].value == 2.0 and members[1][1]["electrolyte"].value == "CuSO4"

    # a deleted specimen leaves the study's table at once, and its rows go when the web layer forgets it
    store.delete(specimens[2].id)
    assert [record.id for record, _ in studies.members(study.id)] == [specimens[0].id, specimens[1].id]
    assert studies.conditions_of(specimens[2].id)
    studies.forget_specimen(specimens[2].id)
    assert studies.conditions_of(specimens[2].id) == {}
    assert studies.get(study.id).n_specimens == 2


def test_a_failed_attach_changes_nothing(store):
    studies = StudyStore(store.engine)
    specimens = [store.add(_analysis(i), {"a.png": b"x"}) for i in range(3)]
    study = studies.create("series")
    studies.attach(study.id, [(specimens[0].id, parse_conditions({"voltage": "3 V"})),
                              (specimens[1].id, parse_conditions({"voltage": "4 V"}))])
    before = _snapshot(studies, study.id)

    with pytest.raises(UnknownSpecimenError):
        studies.attach(study.id, [(specimens[2].id, parse_conditions({"voltage": "5 V"})), ("no-such-id", None)])
    assert _snapshot(studies, study.id) == before
    assert studies.conditions_of(specimens[2].id) == {}

    # 'voltage' is a voltage in this study: a concentration or a text under that name is refused
    with pytest.raises(ConditionError):
        studies.attach(study.id, [(specimens[2].id, parse_conditions({"voltage": "0.1 mol/L"}))])
    with pytest.raises(ConditionError):
        studies.set_conditions(specimens[0].id, parse_conditions({"voltage": "high"}))
    assert _snapshot(studies, study.id) == before
    assert studies.conditions_of(specimens[2].id) == {}


def test_studies_are_scoped_to_their_lab(store):
    studies = StudyStore(store.engine)
    ours = store.add(_analysis(0), {"a.png": b"x"}, owner="lab-a")
    theirs = store.add(_analysis(1), {"a.png": b"x"}, owner="lab-b")
    study = studies.create("ours", owner="lab-a")
    assert studies.get(study.id, owner="lab-b") is None
    assert studies.members(study.id, owner="lab-b") is None
    assert not studies.attach(study.id, [(ours.id, None)], owner="lab-b")
    with pytest.raises(UnknownSpecimenError):  # another lab's specimen is unknown here
        studies.attach(study.id, [(theirs.id, None)], owner="lab-a")
    assert studies.members(study.id, owner="lab-a") == []
    assert studies.delete(study.id, owner="lab-a") and studies.get(study.id) is None


def _film(i: int) -> dict:
    # the shape of a stored film's JSON that studies read: its last frame's analysis and its growth figures
    return {"frames": 3, "final": _analysis(10 + i),
            "front_velocity_px_per_s": {"value": 0.5 + i, "ci95": [0.25 + i, 0.75 + i]},
            "tip_growth_share": {"value": 0.8}}


def test_a_growth_film_is_a_member_like_a_specimen(store):
    from service.store import FilmRecord, FilmStore

    studies, films = StudyStore(store.engine), FilmStore(store)
    specimen = store.add(_analysis(0), {"a.png": b"x"}, owner="lab-a")
    film = films.add(_film(0), {"thumbnail.png": b"x"}, label="cell 7", owner="lab-a")
    theirs = films.add(_film(1), {"thumbnail.png": b"x"}, owner="lab-b")
    study = studies.create("voltage series", owner="lab-a")

    assert studies.set_conditions(film.id, parse_conditions({"voltage": "4 V"}), owner="lab-a") is not None
    assert studies.set_conditions(theirs.id, parse_conditions({"voltage": "4 V"}), owner="lab-a") is None
    assert studies.attach(study.id, [(specimen.id, parse_conditions({"voltage": "2 V"})), (film.id, None)],
                          owner="lab-a")
    members = studies.members(study.id, owner="lab-a")
    assert [record.id for record, _ in members] == [specimen.id, film.id]
    assert isinstance(members[1][0], FilmRecord) and members[1][1]["voltage"].value == 4.0
    assert studies.get(study.id).n_specimens == 2
    before = _snapshot(studies, study.id)

    # all or nothing, and another lab's film is unknown here
    with pytest.raises(UnknownSpecimenError):
        studies.attach(study.id, [(film.id, parse_conditions({"voltage": "5 V"})), (theirs.id, None)], owner="lab-a")
    with pytest.raises(ConditionError):  # 'voltage' is a voltage in this study
        studies.set_conditions(film.id, parse_conditions({"voltage": "0.1 M"}), owner="lab-a")
    assert _snapshot(studies, study.id) == before

    # deleting the film takes it out of the study; forgetting it drops its rows and conditions
    assert films.delete(film.id, owner="lab-a")
    assert [record.id for record, _ in studies.members(study.id)] == [specimen.id]
    assert studies.get(study.id).n_specimens == 1
    studies.forget_specimen(film.id)
    assert studies.conditions_of(film.id) == {}
