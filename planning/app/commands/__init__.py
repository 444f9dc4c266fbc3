"""The ``gripsight`` commands, grouped by what they work on; each module registers on ``cli.app``."""
