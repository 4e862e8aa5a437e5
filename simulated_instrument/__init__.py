"""simulated_instrument package."""
