"""Sub-commands of the ``limen`` CLI, one module each."""
