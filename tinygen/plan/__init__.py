"""Arena planning: buffers and lifetimes, offset assignment strategies, an independent verifier."""
from tinygen.plan.lifetimes import Buffer, build_buffers
from tinygen.plan.strategies import PLANNERS, MemoryPlan, plan_memory
from tinygen.plan.verify import verify_plan

__all__ = ["Buffer", "build_buffers", "PLANNERS", "MemoryPlan", "plan_memory", "verify_plan"]
