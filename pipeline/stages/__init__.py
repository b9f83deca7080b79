"""The stages and their stage-only helpers (gates, selection, ledger, privacy,
transcripts). Imports pipeline.core, pipeline.signal and pipeline.text.

``STAGES`` is the registry the commands hand to the runner: the ``Stage`` contract each
stage module declares as ``STAGE`` at its end, in running order (``names.STAGES``).
A stage's module is imported when the registry is first asked for it, not here: a
stage's code version follows its module's imports, and an import of every stage here
would make each stage's version cover the others.
"""

from pipeline.core import names
from pipeline.core.stage import StageRegistry

STAGES = StageRegistry(order=names.STAGES, package=__name__)
