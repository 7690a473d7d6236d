"""Models: the mixed-model engine, mean model, comparison and likelihood-ratio tests, GEE rows, effect statements, the fitted model set and study planning."""
