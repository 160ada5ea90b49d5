"""The plant database: one PostgreSQL database that every station forwards its ledger to.

A station keeps its own SQLite ledger as the record it works from; its feed (feed.py, a
thread of its own) forwards every row it records to the plant database, which answers the
questions that span stations (a lot over every line, a cell formed at one station and graded
at another). The plant may import the ledger it reads, the pure core it decides with (judge,
rulebook, read), the letters it queues (mail), the shared records (model, acceptance) and
the errors; never the station, the command line, the demo, regrade or audit, which use it.
"""
