"""atomq's workers: Celery processes that run jobs against registered calculators."""
