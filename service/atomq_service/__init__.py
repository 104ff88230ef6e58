"""atomq's service: validates and records jobs, dispatches them, and serves results."""
