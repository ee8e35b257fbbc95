"""The model: terms and their scaler, the online ridge model, its closed form, its stability."""
