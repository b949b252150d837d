"""The application: the TOML config, the run service, the command line and the demo."""

from ._cli import main
from ._config import RunConfig, config_from_dict, load_config, named_fields

__all__ = ["main", "RunConfig", "load_config", "config_from_dict", "named_fields"]
