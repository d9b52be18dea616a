"""The sample models' training corpus and recipe, kept apart from the engine."""
