"""Pipeline stages in their order; each module declares NAME, CONFIG_SECTIONS, UPSTREAM, run."""

from pipeline.stages import analyze, assemble, evolve, report, solve, verify

#: stage modules in execution order
STAGES = (assemble, solve, analyze, evolve, verify, report)
STAGE_NAMES = tuple(stage.NAME for stage in STAGES)

__all__ = ["STAGES", "STAGE_NAMES"]
