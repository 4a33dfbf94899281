"""Human-facing views of a compiled model: the plan as text and SVG, and an HTML report.

  plan_view   figures derived from a MemoryPlan (live bytes per step, peak, buffer rows),
              `plan_table` (text for `tinygen plan`), `plan_svg` (arena over time),
              `compare_planners` (every planner x order re-planned)
  html        `write_report`: one self-contained HTML file with budgets and verdicts
"""
