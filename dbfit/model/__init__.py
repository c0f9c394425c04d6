"""Plain values of a fitted model: Model, inference, the model document."""
