"""Results against observations: scoring projections with counts observed later, and
conditioning an ensemble on counts observed so far."""
