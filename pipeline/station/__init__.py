"""The unattended station: claiming finished files, the worker pool, publishing, cells, lots
and their digests, reviews, the channel watch, the plant feed, its settings (the settings/
subpart), status, the outbox deliverer, and everything that keeps it running through bad
inputs and faults of its surroundings. Its records are kept in the ledger (pipeline.ledger).
May import every part below it (the core, report, mail, the ledger, the plant database);
never the audit, the regrade, the demo or the command line.
"""
