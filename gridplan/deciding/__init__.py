"""The deciding side: learning curves, noise floor, diagnosis, plan and advice, read from the store."""
