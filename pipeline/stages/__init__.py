"""The stages and their stage-only helpers (gates, selection, ledger, privacy,
transcripts). Imports pipeline.core, pipeline.signal and pipeline.text.

``STAGES`` is the registry the commands hand to the runner: the stage names in running
order, each the name of a module of this package.
"""

from pipeline.core.stage import StageRegistry

STAGES = StageRegistry(order=("ingest", "audio", "text", "split"), package=__name__)
