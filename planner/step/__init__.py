"""One planning step: models, candidate pool, the safety screen, ranking, the batch."""
