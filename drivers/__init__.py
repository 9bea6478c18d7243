"""Built-in instrument drivers for straind.

Each module holds one driver; they are registered as entry points in the group
``straind.drivers`` (see pyproject.toml) and imported only when a configuration names them.
"""
