"""``benchspec view [--source 0|/dev/video0|file.avi|folder|demo]``: the live bench viewer."""

from __future__ import annotations

import argparse
import logging
import sys

from ..safety import SOURCE_TYPES, format_cautions

_KEYS_HELP = """keyboard shortcuts in the viewer:
  space   hold the spectrum / go live     s  stack N frames     d  take a dark
  b       measure the band again          c  calibrate with the chosen lamp
  i       identify                        +/-  exposure
  Ctrl+Enter  capture frames, spectrum and calibration to the session log
  Ctrl+S  save spectrum   Ctrl+K  save calibration   Ctrl+F  save frame
  Ctrl+P  save plot       Ctrl+L  load calibration   Ctrl+O  open video
  F1      light source and its cautions              Ctrl+Q  quit
"""


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "view",
        help="open the live bench viewer (camera, video, image folder or the demo bench)",
        description="Open the live bench viewer. Before live capture starts it asks what light you are "
                    "measuring and shows that source's cautions. With no --source it uses the first camera "
                    "found, or the demo bench when there is none.",
        epilog="SAFETY CAUTIONS\n\n" + format_cautions() + "\n\n" + _KEYS_HELP,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--source", metavar="SOURCE", default=None,
                        help="camera index (0) or device (/dev/video0), a video file, an image folder, "
                             "or 'demo' / 'demo:SCENE' (e.g. demo:tube_A); default: first camera, else demo")
    parser.add_argument("--light", choices=SOURCE_TYPES, default=None,
                        help="the light being measured (its cautions are still shown before capture)")
    parser.add_argument("--lamp", default=None, help="calibration lamp preselected in the viewer (e.g. cfl, hg)")
    parser.add_argument("--width", type=int, default=1280, help="camera width to request (px)")
    parser.add_argument("--height", type=int, default=720, help="camera height to request (px)")
    parser.add_argument("--fps", type=float, default=30.0, help="camera frame rate to request")
    parser.add_argument("--no-loop", action="store_true", help="stop at the end of a video or folder")
    parser.add_argument("--session", metavar="DIR", default=None,
                        help="session folder (capture log) that Ctrl+Enter saves captures to")
    parser.add_argument("--log", metavar="FILE", default=None, help="also write the viewer's log to FILE")
    parser.add_argument("--geometry", default="1024x768", help="window size, e.g. 1024x768 (projectors)")
    parser.set_defaults(handler=_run)


def choose_source(spec: str | None, *, loop: bool = True, settings=None):
    """The source to open and the messages to show: falls back to the demo when there is no camera.

    Returns
    -------
    source : FrameSource
    messages : list of str
    """
    from ..errors import SourceError
    from ..sources import DemoSource, find_cameras, open_source

    messages: list[str] = []
    if spec is None:
        cameras = find_cameras()
        if cameras:
            spec = cameras[0]
        else:
            messages.append("no camera found: showing the demo bench instead (open another source with Source ▾)")
            return DemoSource(), messages
    try:
        return open_source(spec, loop=loop, settings=settings), messages
    except SourceError as exc:
        looks_like_camera = spec.isdigit() or spec.startswith("/dev/")
        if not looks_like_camera:
            raise
        messages.append(f"{exc}; showing the demo bench instead")
        return DemoSource(), messages


def _run(args) -> int:
    from ..sources import CameraSettings

    logger = logging.getLogger("benchspec.viewer")
    logger.setLevel(logging.INFO)
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("benchspec view: %(levelname)s: %(message)s"))
    logger.addHandler(handler)
    if args.log:
        file_handler = logging.FileHandler(args.log, encoding="utf-8")
        file_handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s"))
        logger.addHandler(file_handler)

    settings = CameraSettings(width_px=args.width, height_px=args.height, frame_rate_hz=args.fps)
    source, messages = choose_source(args.source, loop=not args.no_loop, settings=settings)
    # the messages reach stderr through the viewer's log, once the window is open

    try:
        import tkinter as tk

        root = tk.Tk()
    except Exception as exc:  # no display, or Tk missing
        source.close()
        from ..errors import InputError

        raise InputError(f"the viewer cannot open a window ({exc}); run it on a desktop, or under Xvfb "
                         "(Debian package xvfb: `xvfb-run benchspec view`)") from None
    from ..gui.app import Viewer

    root.geometry(args.geometry)
    viewer = Viewer(root, source=source, light=args.light, messages=messages, session_folder=args.session)
    if args.lamp:
        viewer.lamp.set(args.lamp)
    root.mainloop()
    viewer.close()
    return 0
