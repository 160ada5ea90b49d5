"""Auditing what a station published: `formgate verify`'s checks of certificates, results,
verification codes and the whole ledger (its hash chains, files on disk, archived inputs).
Reads a station's ledger and folders and never writes them. May import: the ledger, the
report's verification code, the station's settings and its record of published files.
Nothing but the command line imports it.
"""
