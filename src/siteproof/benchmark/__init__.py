"""The teaching benchmark: leak audit, sealing, grading."""
