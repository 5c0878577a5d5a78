"""pamjoint's controllers: feedforward, feedback and trial-to-trial learners (no model equations)."""
