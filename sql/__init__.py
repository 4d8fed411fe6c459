"""The SQL templates, installed as the package ``monitor.sql``.

This file makes the folder a regular package, so that
``importlib.resources.files("monitor.sql")`` is one folder (not a namespace
over several) in a wheel, an editable install and a zip file alike.
"""
