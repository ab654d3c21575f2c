"""Pipeline stages in their order; each module declares NAME, CONFIG_SECTIONS, UPSTREAM, run."""

from pipeline.stages import assemble, report, solve, verify

#: stage modules in execution order
STAGES = (assemble, solve, verify, report)
STAGE_NAMES = tuple(stage.NAME for stage in STAGES)

__all__ = ["STAGES", "STAGE_NAMES"]
