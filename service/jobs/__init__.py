"""Training jobs: the database queue, the training job itself, the executors that run it and the worker processes."""

__all__: list[str] = []
