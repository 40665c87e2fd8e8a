"""Read a TOML file (preset, shaper, MIDI map, feed, socket preset) with one clean error for every failure.

Every reader of a TOML file in rtstage goes through :func:`load_toml`, so a
missing file, a folder, an unreadable file, a syntax error and text that is
not UTF-8 each give the same one-line :class:`~rtstage.errors.RtstageError`,
``<label>: <reason>``, whatever the file is for.
"""

import tomllib

from ..errors import RtstageError


def load_toml(path, label):
    """The parsed TOML document at ``path`` (a dict).

    Parameters
    ----------
    path : str
        File to read.
    label : str
        How the error line names the file, for example ``"feed /etc/rtstage/air.toml"``.

    Raises
    ------
    RtstageError
        ``<label>: no such file``, ``is a folder``, ``cannot read (<reason>)``,
        ``not valid TOML (<parser's message>)`` or ``not UTF-8 text (byte N)``;
        a missing file raises the subclass :class:`TomlFileMissing`, so a caller
        can say what would have been found instead.
    """
    try:
        with open(path, "rb") as f:
            return tomllib.load(f)
    except FileNotFoundError:
        raise TomlFileMissing(f"{label}: no such file") from None
    except IsADirectoryError:
        raise RtstageError(f"{label}: is a folder, not a file") from None
    except OSError as exc:
        raise RtstageError(f"{label}: cannot read ({exc.strerror})") from None
    except tomllib.TOMLDecodeError as exc:
        raise RtstageError(f"{label}: not valid TOML ({exc})") from None
    except UnicodeDecodeError as exc:
        raise RtstageError(f"{label}: not UTF-8 text (byte {exc.start})") from None


class TomlFileMissing(RtstageError):
    """:func:`load_toml` found no file at the path."""
