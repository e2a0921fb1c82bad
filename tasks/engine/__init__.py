"""The debiasing engine: plain numpy/torch, no Prefect. See :func:`tasks.engine.trainer.fit`."""
