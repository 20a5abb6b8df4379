"""SQLite's query plan of the statement a store method runs, for tests that a query searches an
index instead of walking a model's whole history."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from monitor.store import Store


def plan_of_statement(store: Store, run: Callable[[], Any]) -> tuple[Any, str]:
    """What ``run()`` returns, and SQLite's query plan of the first statement it executed (its
    main query; traced with its parameters filled in)."""
    executed: list[str] = []
    store._conn.set_trace_callback(executed.append)
    try:
        result = run()
    finally:
        store._conn.set_trace_callback(None)
    statement = executed[0]
    plan = " | ".join(str(row[3]) for row in store._conn.execute(f"EXPLAIN QUERY PLAN {statement}"))
    return result, plan
