"""The unattended station: claiming finished files, workers, the SQLite ledger and its
migrations, settings, status, the outbox deliverer, and everything that keeps it running
through bad inputs and faults of its surroundings. May import everything but the demo.
"""
