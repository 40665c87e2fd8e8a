"""``rtstage devices``: the audio devices and host APIs PortAudio sees."""

import json


def register(subparsers):
    """Add the ``devices`` subcommand."""
    devices = subparsers.add_parser("devices", help="list audio devices and host APIs")
    devices.add_argument("--json", action="store_true", help="print the listing as JSON")
    devices.set_defaults(handler=devices_command)


def devices_command(args):
    """Handler of ``rtstage devices``."""
    from ..live.devices import list_devices

    listing = list_devices()
    if args.json:
        print(json.dumps(listing, indent=1))
        return 0
    for api in listing["hostapis"]:
        print(f"host API {api['index']}: {api['name']}")
        for d in listing["devices"]:
            if d["hostapi"] != api["name"]:
                continue
            mark = "  (!) " + d["warning"] if d["warning"] else ""
            print(f"  {d['index']:3d}  {d['name']}  in {d['max_input_channels']}, out {d['max_output_channels']}, "
                  f"{d['default_samplerate']:g} Hz{mark}")
    return 0
