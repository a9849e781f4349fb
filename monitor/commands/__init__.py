"""Click sub-commands of ``whirlwatch``, one module each."""
