"""``labkit lab``: the JupyterLab (or app-mode Voila) front end on a working folder.

:mod:`labkit.lab.workfolder` prepares the working folder (the starter notebook and a demo roster,
never overwriting a user's edited copy); :mod:`labkit.lab.server` builds and runs the server
command (loopback, random token, raised websocket limit for capture uploads).
"""
