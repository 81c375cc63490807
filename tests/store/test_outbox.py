"""The alert outbox and acknowledgements."""

from __future__ import annotations

from monitor.store import CommitBatch, OutboxAlert, StoredAck, schema
from tests.store.samples import T0, alert


async def test_an_alert_goes_from_pending_through_attempts_to_sent(store):
    """A new alert is pending with no attempts; attempts count up; once sent it is no longer pending."""
    first, second = alert("a", "a-1", created_ms=T0), alert("a", "a-2", created_ms=T0 + 1)
    await store.commit(CommitBatch(alerts=[first, second]))
    assert await store.pending_alerts() == [
        OutboxAlert("a-1", "a", first.event_type, first.event, 0),
        OutboxAlert("a-2", "a", second.event_type, second.event, 0),
    ]
    await store.note_attempt(["a-1"])
    await store.note_attempt(["a-1", "a-2"])
    assert [(p.id, p.attempts) for p in await store.pending_alerts()] == [("a-1", 2), ("a-2", 1)]
    await store.mark_sent(["a-1"], T0 + 500)
    assert [p.id for p in await store.pending_alerts()] == ["a-2"]


async def test_pending_alerts_come_oldest_first_up_to_the_limit(store):
    """pending_alerts orders by creation time, whatever the commit order, and stops at limit."""
    created = {"late": T0 + 30, "early": T0 + 10, "middle": T0 + 20}
    await store.commit(CommitBatch(alerts=[alert("a", i, created_ms=ms) for i, ms in created.items()]))
    assert [p.id for p in await store.pending_alerts()] == ["early", "middle", "late"]
    assert [p.id for p in await store.pending_alerts(limit=2)] == ["early", "middle"]


async def test_marking_an_alert_sent_again_keeps_the_first_time(store, database):
    """mark_sent records the first sending time; a repeated call does not move it."""
    await store.commit(CommitBatch(alerts=[alert("a", "a-1")]))
    await store.mark_sent(["a-1"], T0 + 100)
    await store.mark_sent(["a-1"], T0 + 200)
    await store.mark_sent([], T0 + 300)
    assert [row["sent_ms"] for row in database.rows(schema.alerts)] == [T0 + 100]


async def test_a_commit_marks_the_alerts_published_since_the_last_one(store, database):
    """CommitBatch.sent marks outbox rows sent in the same transaction; the first time is kept."""
    await store.commit(CommitBatch(alerts=[alert("a", "a-1"), alert("a", "a-2"), alert("a", "a-3")]))
    await store.commit(CommitBatch(alerts=[alert("a", "a-4")], sent=[("a-1", T0 + 100), ("a-2", T0 + 110)]))
    assert [p.id for p in await store.pending_alerts()] == ["a-3", "a-4"]
    await store.commit(CommitBatch(sent=[("a-1", T0 + 900), ("a-3", T0 + 120), ("no-such", T0)]))
    sent = {row["id"]: row["sent_ms"] for row in database.rows(schema.alerts)}
    assert sent == {"a-1": T0 + 100, "a-2": T0 + 110, "a-3": T0 + 120, "a-4": None}


async def test_an_alert_names_its_chart(store):
    """alert_chart gives the chart of a stored alert and None for an unknown id."""
    await store.commit(CommitBatch(alerts=[alert("press-1/bore", "x-1")]))
    assert await store.alert_chart("x-1") == "press-1/bore"
    assert await store.alert_chart("x-2") is None


async def test_an_ack_of_an_unknown_alert_is_refused(store, database):
    """record_ack returns False and stores nothing when the alert does not exist."""
    await store.commit(CommitBatch(alerts=[alert("a", "a-1")]))
    assert await store.record_ack(StoredAck("a-404", "a", "maria", "checked", T0)) is False
    assert database.count(schema.acks) == 0


async def test_an_ack_naming_another_chart_is_refused(store, database):
    """record_ack returns False when the alert belongs to a different chart."""
    await store.commit(CommitBatch(alerts=[alert("a", "a-1"), alert("b", "b-1")]))
    assert await store.record_ack(StoredAck("a-1", "b", "maria", "checked", T0)) is False
    assert database.count(schema.acks) == 0


async def test_a_repeated_ack_is_stored_once(store, database):
    """The same ack twice is one row; the same person at another time is a second row."""
    await store.commit(CommitBatch(alerts=[alert("a", "a-1")]))
    ack = StoredAck("a-1", "a", "maria", "die changed", T0 + 5)
    assert await store.record_ack(ack) is True
    assert await store.record_ack(ack) is True
    assert await store.record_ack(StoredAck("a-1", "a", "maria", "still fine", T0 + 6)) is True
    rows = sorted(database.rows(schema.acks), key=lambda r: r["at_ms"])
    assert [(r["acked_by"], r["note"], r["at_ms"]) for r in rows] == [
        ("maria", "die changed", T0 + 5),
        ("maria", "still fine", T0 + 6),
    ]
