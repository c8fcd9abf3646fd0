"""Shelving and acknowledge-all in the alarm engine (service.alarms.shelving): a shelved rule
evaluates and logs but is not annunciated; expiry, unshelve, snapshot, all-or-nothing acks.

Pure engine tests, time passed in (ISA-18.2 shelving, from memory: docs/references.md)."""

from __future__ import annotations

import pytest

from service.alarms import (
    SHELVE_MAX_S,
    AckRefused,
    AlarmEngine,
    ShelveRefused,
    UnknownAlarm,
)
from tests.service.test_alarms import T0, frame, overall_rule

S = 1_000_000_000


def engine() -> AlarmEngine:
    return AlarmEngine([overall_rule("m1", on_delay_s=0.0, off_delay_s=0.0, latch=True),
                        overall_rule("m2", on_delay_s=0.0, off_delay_s=0.0)])


def test_a_shelved_rule_still_evaluates_and_logs_but_is_not_active() -> None:
    e = engine()
    ev = e.shelve("m1.overall", "olga", "bearing swap tonight", T0 + 3600 * S, t_ns=T0)
    assert (ev.kind, ev.rule, ev.acked_by, ev.note) == (
        "shelve", "m1.overall", "olga", "bearing swap tonight")
    assert ev.from_state == ev.to_state == "normal"
    assert ev.message == "m1 overall: shelved by olga for 1 h: bearing swap tonight"
    assert e.is_shelved("m1.overall") and not e.is_shelved("m2.overall")
    assert not e.is_shelved("nope")
    evs = e.evaluate(frame("m1", 1, overall=1.5), "ok") + e.evaluate(frame("m2", 1, 1.5), "ok")
    # both rules raise an event (logged), but only the unshelved one is annunciated
    assert [(x.rule, x.to_state) for x in evs] == [("m1.overall", "alert"),
                                                 ("m2.overall", "alert")]
    assert [v.rule for v in e.active()] == ["m2.overall"]
    assert evs[0].message.endswith("(shelved: not annunciated)")
    assert "shelved" not in evs[1].message
    (sh,) = e.shelved()
    assert (sh.rule, sh.state.value, sh.shelved, sh.shelve_reason) == (
        "m1.overall", "alert", True, "bearing swap tonight")
    assert sh.shelved_until_ns == T0 + 3600 * S and sh.shelved_ns == T0


def test_shelve_refuses_bad_input_and_a_second_shelve() -> None:
    e = engine()
    with pytest.raises(ValueError, match="needs a reason"):
        e.shelve("m1.overall", "olga", "  ", T0 + S, t_ns=T0)
    with pytest.raises(ValueError, match="needs who"):
        e.shelve("m1.overall", "", "r", T0 + S, t_ns=T0)
    with pytest.raises(ValueError, match="must be in the future"):
        e.shelve("m1.overall", "olga", "r", T0, t_ns=T0)
    with pytest.raises(ValueError, match="at most 7 days"):
        e.shelve("m1.overall", "olga", "r", T0 + (SHELVE_MAX_S + 1) * S, t_ns=T0)
    with pytest.raises(UnknownAlarm, match="no alarm rule 'zz'"):
        e.shelve("zz", "olga", "r", T0 + S, t_ns=T0)
    e.shelve("m1.overall", "olga", "r", T0 + SHELVE_MAX_S * S, t_ns=T0)  # the bound itself
    with pytest.raises(ShelveRefused, match="already shelved by 'olga'"):
        e.shelve("m1.overall", "ivan", "r2", T0 + S, t_ns=T0)
    with pytest.raises(ShelveRefused, match="is not shelved"):
        e.unshelve("m2.overall", "olga", t_ns=T0)


def test_unshelve_and_expiry_annunciate_an_active_alarm_again() -> None:
    e = engine()
    e.evaluate(frame("m1", 0, overall=1.5), "ok")
    e.shelve("m1.overall", "olga", "r", T0 + 10 * S, t_ns=T0)
    assert e.active() == []
    assert e.expire_shelves(T0 + 10 * S - 1) == []  # not yet
    (ev,) = e.expire_shelves(T0 + 10 * S)
    assert (ev.kind, ev.note, ev.acked_by, ev.t_ns) == ("shelve-expired", "r", "", T0 + 10 * S)
    assert ev.message == "m1 overall: shelve ended at its end time; ALERT is annunciated again"
    assert [v.rule for v in e.active()] == ["m1.overall"]
    assert e.expire_shelves(T0 + 20 * S) == []  # once only
    e.shelve("m1.overall", "olga", "again", T0 + 60 * S, t_ns=T0 + 20 * S)
    ev = e.unshelve("m1.overall", "ivan", t_ns=T0 + 30 * S)
    assert (ev.kind, ev.acked_by, ev.note) == ("unshelve", "ivan", "again")
    assert not e.is_shelved("m1.overall") and e.shelved() == []


def test_a_shelve_is_in_the_snapshot() -> None:
    e = engine()
    e.shelve("m2.overall", "olga", "kept", T0 + 99 * S, t_ns=T0)
    again = engine()
    again.restore(e.snapshot())
    (sh,) = again.shelved()
    assert (sh.rule, sh.shelved_by, sh.shelve_reason, sh.shelved_until_ns) == (
        "m2.overall", "olga", "kept", T0 + 99 * S)


def test_ack_many_acknowledges_each_or_none() -> None:
    e = engine()
    e.evaluate(frame("m1", 0, overall=1.5), "ok")
    e.evaluate(frame("m2", 0, overall=2.5), "ok")
    assert e.ackable() == ["m1.overall", "m2.overall"]
    assert e.ackable(["m2.overall", "zz"]) == ["m2.overall"]
    e.ack("m1.overall", "olga", t_ns=T0 + S)
    with pytest.raises(AckRefused):  # m1 is already acknowledged: nothing changes
        e.ack_many(["m2.overall", "m1.overall"], "ivan", t_ns=T0 + 2 * S)
    assert not e.view("m2.overall").acked
    evs = e.ack_many(["m2.overall"], "ivan", "seen", t_ns=T0 + 2 * S)
    assert [(x.kind, x.rule, x.to_state, x.acked_by, x.note) for x in evs] == [
        ("ack", "m2.overall", "danger", "ivan", "seen")]
    assert e.ackable() == []
