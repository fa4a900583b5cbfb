"""The order and result contract: the models, reading bytes into an order, rounding to the contract's precision."""
