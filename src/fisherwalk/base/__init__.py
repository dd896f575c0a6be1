"""Building blocks below every stage of fisherwalk: input checks, safe file I/O, the JSON
convention and the writer's lock. Nothing here knows about models, fits or chains."""
