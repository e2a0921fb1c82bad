"""Stage 2, train: the night's window goes to the engine (``tasks/engine``, plain numpy/torch) as a
candidate and a plain shadow model, warm-started from the base version."""
