"""HTTP read API for pricers (FastAPI): the app is :func:`calib.api.app.create_app`.

Importing this package loads nothing heavy; :mod:`calib.api.tokens` (the approval token) needs
no web framework, so the CLI can check a token before it starts the server.
"""
