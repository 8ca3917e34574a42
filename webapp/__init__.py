"""recinet's web app: a thin Dash + Plotly layer over :mod:`analysis`.

``recinet serve`` calls :func:`webapp.app.run`; ``webapp.app:server`` is the
WSGI application for gunicorn.
"""
