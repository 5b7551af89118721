"""Models: exact GP regression, its hyperparameter search, limit-model guards, worker processes."""
