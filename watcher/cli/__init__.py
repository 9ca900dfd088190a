"""The `watcher` command: a thin layer of click commands over the library.

`app.main` is the group; each module registers its commands on it, and shares options, time
stamps and the table printer through `common` (the modules never import each other).
"""

from watcher.cli import lots, model, records, site, whatif  # noqa: F401  (register the commands)
from watcher.cli.app import main

__all__ = ["main"]
