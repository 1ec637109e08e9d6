"""Clock assessment: holdover prediction, trend tests and the evidence behind verdicts."""
