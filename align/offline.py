"""The environment every align process runs in: models from local paths only, quiet tokenizers.

``use_offline_defaults()`` sets them in this process (the CLI, a service worker, the tests);
``offline_env(env)`` in the environment handed to a child process. Values the user set win.
"""
from __future__ import annotations

import os
from typing import MutableMapping

OFFLINE_DEFAULTS = {
    "HF_HUB_OFFLINE": "1",  # never reach a model hub: towers load from local files
    "TRANSFORMERS_OFFLINE": "1",
    # the tokenizers library's own thread pool warns (and can deadlock) once a process forks
    "TOKENIZERS_PARALLELISM": "false",
}


def offline_env(env: MutableMapping[str, str]) -> MutableMapping[str, str]:
    """Add the defaults to ``env`` where it does not set them; returns ``env``."""
    for name, value in OFFLINE_DEFAULTS.items():
        env.setdefault(name, value)
    return env


def use_offline_defaults() -> None:
    """Set the defaults in this process's environment, before transformers or tokenizers are imported."""
    offline_env(os.environ)
