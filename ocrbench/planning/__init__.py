"""Archive planning: cost model, estimates, decisions, inputs (stores, plan files), and the one plan() service."""
