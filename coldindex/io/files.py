"""Light file checks that run before any work: the config file, input paths, identity.

Nothing here imports the numerical stack, so a bad config or a missing input is
refused in a fraction of a second.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

from coldindex.errors import ConfigError, os_error_sentence

if TYPE_CHECKING:
    from coldindex.config import Config

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib


def read_toml(path: Path) -> dict[str, Any]:
    """The parsed TOML file, or one sentence saying what is wrong with it."""
    if path.is_dir():
        raise ConfigError(f"Config file {path} is a folder; give the path of a TOML file.")
    try:
        return tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ConfigError(f"Config file {path} does not exist; give the path of a TOML "
                          "file.") from None
    except OSError as exc:
        raise ConfigError(os_error_sentence(exc, "reading the config file", path)) from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(f"Config file {path} is not valid TOML ({exc}); fix the syntax "
                          "at that place.") from None


def is_file(path: Path) -> bool:
    """Whether ``path`` is a file (a frozen domain, an earlier release's cut values)."""
    return path.is_file()


def same_file(a: Path, b: Path) -> bool:
    """True when two paths name the same file (real path, or device and inode)."""
    try:
        if os.path.realpath(a) == os.path.realpath(b):
            return True
        sa, sb = os.stat(a), os.stat(b)
    except (OSError, ValueError):
        return False
    return (sa.st_dev, sa.st_ino) == (sb.st_dev, sb.st_ino)


def check_input_files(files: Mapping[str, Path]) -> None:
    """Every named input exists as a file, and no file is given twice.

    Parameters
    ----------
    files
        Inputs by the name a user knows them by (a config key or a flag).
    """
    for key, p in files.items():
        if p.is_dir():
            raise ConfigError(f"{key} names {p}, which is a folder; give the file.")
        if not p.is_file():
            raise ConfigError(f"{key} names {p}, which does not exist or is not a file; fix the "
                              "path (relative to the config file) or comment the line out.")
    seen: list[tuple[str, Path]] = []
    for key, p in files.items():
        for other_key, q in seen:
            if same_file(p, q):
                raise ConfigError(f"{key} and {other_key} name the same file ({p}), given "
                                  "twice; give each input once.")
        seen.append((key, p))


def relative_to(path: Path, base: Path) -> str:
    """``path`` as written relative to ``base`` when inside it (POSIX form), else absolute.

    Releases record inputs this way, so they do not change when only the spelling of a
    path changes (relative or absolute, ``./`` or not).
    """
    real, root = Path(os.path.realpath(path)), Path(os.path.realpath(base))
    try:
        return real.relative_to(root).as_posix()
    except ValueError:
        return real.as_posix()


def read_frame(path: Path) -> Any:
    """A CSV this tool wrote (e.g. a release's ``indices.csv``), as a frame."""
    import pandas as pd

    return pd.read_csv(path)


def read_bytes(path: Path) -> bytes:
    """A file's bytes (e.g. a figure embedded in the report)."""
    return path.read_bytes()


def load_config(path: Path) -> Config:
    """Read and validate a TOML configuration file.

    Parameters
    ----------
    path
        The TOML file.

    Returns
    -------
    Config
        The validated configuration, paths resolved relative to the file.
    """
    from coldindex.config import config_from_mapping

    return config_from_mapping(read_toml(path), base=path.parent, source=path)


def check_inputs(cfg: Config) -> None:
    """The inputs a configuration names exist, are files, and are each given once."""
    from coldindex.errors import ConfigError

    if (cfg.inputs.casts is None) == (cfg.inputs.profiles is None):
        raise ConfigError("inputs.casts or inputs.profiles needs to be set (one of them, not "
                          "both): the path of the casts file or of the profiles file.")
    if cfg.inputs.ice is not None and cfg.inputs.ice_fields:
        raise ConfigError("inputs.ice and inputs.ice_fields are both set; give the monthly ice "
                          "file or the gridded ice fields, not both.")
    check_input_files(cfg.inputs.files())
