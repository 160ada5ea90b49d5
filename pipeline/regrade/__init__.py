"""Regrading: inputs already judged, judged again under a rules folder on a Dask cluster,
and what that changes, reported and (when asked) applied beside the old decisions.

grid.py judges many archived files and yields their result documents as they come back
(rules_bundle.py holds the rules folder they are judged under, tasks.py a batch of them as a
Dask worker judges it); cache.py keeps those judgements so that a stopped regrade resumes
where it stopped; none of them touches a station's ledger. archive.py chooses the inputs
from a station's ledger (or a folder); changes.py (pure) decides each cell again and lists
what changes. May import: the readers, the judge, the rule book, the report, the ledger and
the station's settings and cell publishing; only the command line imports it.
"""
