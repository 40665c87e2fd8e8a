"""Listing and choosing PortAudio devices and host APIs.

A device is chosen by index, or by name: an exact name first, otherwise the
single device whose name contains the text (case-insensitive).  Several
matches are an error naming them all; no match is an error.  rtstage never
falls back silently to a different device.

Some host APIs and devices mix, resample or convert behind the application's
back; then the words rtstage computes are not the words that reach the
hardware.  :func:`conversion_warning` names the known cases.
"""

import sounddevice as sd

from ..errors import RtstageError

_MIXING_DEVICE_NAMES = ("default", "dmix", "pulse", "pipewire", "sysdefault", "plug", "jack")
_MIXING_HOSTAPIS = {
    "MME": "MME always goes through the Windows mixer and its sample-rate converter",
    "Windows DirectSound": "DirectSound goes through the Windows mixer",
    "Windows WASAPI": "WASAPI in shared mode (the default) goes through the Windows mixer; use exclusive mode",
    "Core Audio": "Core Audio converts to float and may resample when the device's nominal rate differs",
}


def hostapi_names():
    """Names of the compiled-in host APIs, by index."""
    return [h["name"] for h in sd.query_hostapis()]


def find_hostapi(spec):
    """Index of the host API given by index or name (exact first, then a unique substring)."""
    if spec is None:
        return None
    names = hostapi_names()
    return _choose(spec, names, "host API", list(range(len(names))))


def _choose(spec, names, what, indices):
    """Pick one of ``indices`` (whose names are ``names``, aligned) by index or name."""
    text = str(spec).strip()
    if text.lstrip("-").isdigit():
        index = int(text)
        if index not in indices:
            raise RtstageError(f"no {what} with index {index} (see 'rtstage devices')")
        return index
    exact = [i for i, n in zip(indices, names) if n == text]
    if len(exact) == 1:
        return exact[0]
    partial = [i for i, n in zip(indices, names) if text.lower() in n.lower()]
    if len(partial) == 1:
        return partial[0]
    if not partial:
        raise RtstageError(f"no {what} matches '{text}' (see 'rtstage devices')")
    listed = "; ".join(f"{i}: {n}" for i, n in zip(indices, names) if i in partial)
    raise RtstageError(f"'{text}' matches several {what}s ({listed}); give an index or an exact name")


def find_device(spec, kind, hostapi=None, devices=None):
    """Index of the device for ``kind`` ('input' or 'output').

    Parameters
    ----------
    spec : int, str or None
        Index, exact name or unique name substring; None takes the host API's
        (or PortAudio's) default device for ``kind``.
    kind : {'input', 'output'}
    hostapi : int or None
        Restrict the choice to this host API.
    devices : list of dict, optional
        Device list (default: :func:`sounddevice.query_devices`); for tests.

    Returns
    -------
    int
    """
    if devices is None:
        devices = list(sd.query_devices())
    key = "max_input_channels" if kind == "input" else "max_output_channels"
    candidates = [d for d in devices if d[key] > 0 and (hostapi is None or d["hostapi"] == hostapi)]
    if spec is None:
        if hostapi is not None:
            default = sd.query_hostapis(hostapi)["default_input_device" if kind == "input" else "default_output_device"]
        else:
            default = sd.default.device[0 if kind == "input" else 1]
            if default is None or default < 0:
                default = sd.query_hostapis(sd.default.hostapi)["default_" + kind + "_device"] if sd.default.hostapi >= 0 else -1
        if default is None or default < 0:
            raise RtstageError(f"there is no default {kind} device; choose one with --device (see 'rtstage devices')")
        return int(default)
    indices = [d["index"] for d in candidates]
    names = [d["name"] for d in candidates]
    return _choose(spec, names, f"{kind} device", indices)


def describe_device(index):
    """(device name, host API name) of a device index."""
    d = sd.query_devices(index)
    return d["name"], sd.query_hostapis(d["hostapi"])["name"]


def find_by_name(name, hostapi_name, kind):
    """Index of the device called exactly ``name`` in the host API called ``hostapi_name``, or None.

    Used to reopen the same device after the audio system came back.
    """
    try:
        apis = hostapi_names()
    except sd.PortAudioError:
        return None
    if hostapi_name not in apis:
        return None
    api = apis.index(hostapi_name)
    key = "max_input_channels" if kind == "input" else "max_output_channels"
    for d in sd.query_devices():
        if d["hostapi"] == api and d["name"] == name and d[key] > 0:
            return d["index"]
    return None


def conversion_warning(device_name, hostapi_name):
    """A reason the words may be changed before the hardware, or None when none is known."""
    if hostapi_name in _MIXING_HOSTAPIS:
        return _MIXING_HOSTAPIS[hostapi_name]
    if hostapi_name == "ALSA":
        lowered = device_name.lower()
        for word in _MIXING_DEVICE_NAMES:
            if lowered == word or lowered.startswith(word + " ") or f"({word})" in lowered or lowered.startswith(word + ":"):
                return f"ALSA device '{device_name}' is a plugin that may mix, resample or convert; choose a hw: device"
    return None


def hostapi_note(hostapi_name):
    """A neutral note about what a host API does with integer words, or None."""
    if hostapi_name == "JACK Audio Connection Kit":
        return ("JACK carries float32: PortAudio converts each integer word to float32 exactly (w / 2^15 or w / 2^31); "
                "the words survive unless another JACK client mixes into the same ports or the sink converts")
    return None


def list_devices():
    """Plain-data device listing: host APIs and devices (for ``rtstage devices``)."""
    apis = []
    for i, h in enumerate(sd.query_hostapis()):
        apis.append({"index": i, "name": h["name"], "default_input_device": h["default_input_device"],
                     "default_output_device": h["default_output_device"]})
    devs = []
    for d in sd.query_devices():
        api = apis[d["hostapi"]]["name"]
        devs.append({
            "index": d["index"], "name": d["name"], "hostapi": api,
            "max_input_channels": d["max_input_channels"], "max_output_channels": d["max_output_channels"],
            "default_samplerate": d["default_samplerate"],
            "warning": conversion_warning(d["name"], api),
        })
    return {"hostapis": apis, "devices": devs}
