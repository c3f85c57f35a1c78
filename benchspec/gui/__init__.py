"""The bench viewer: a Tk window over the same core calls as the command line.

Modules
-------
app
    :class:`~benchspec.gui.app.Viewer`, the window (``benchspec view`` opens it).
processing
    :class:`~benchspec.gui.processing.BenchProcessor`, the one door to the core
    (frames, geometry, live extraction, calibration, identification, saving).
worker
    The reading and processing threads and their drop-oldest mailboxes.
canvas
    A FigureCanvasTkAgg whose full redraws run off the Tk thread.
colours
    The viewer's palette and CIE 1931 wavelength colours.
perf
    ``python -m benchspec.gui.perf``: frames shown per second and Tk stalls.

Importing this package imports nothing heavy; ``benchspec.gui.app`` needs tkinter.
"""
