"""``python -m pipeline.station.settings > docs/station-settings.md``: the settings reference."""

import sys

from pipeline.station.settings.schema import render_docs

sys.stdout.write(render_docs())
