"""Agents: nodes that keep the filter of a store they do not own (docs/agents.md).

Modules: ledger (the exact set of counted keys), applier (turns a store's change feed into
verified counts), redis_store and postgres_store (the adapters, with pgoutput decoding the
PostgreSQL stream), embedded (an agent inside a Python store's own write path), meta (the
agent's small local state file). The drivers (redis, psycopg2) are imported only by the
adapter modules, so a node without agents needs neither.
"""
