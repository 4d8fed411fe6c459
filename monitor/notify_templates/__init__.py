"""The notification templates (webhook body, digest e-mail), installed as ``monitor.notify_templates``.

A regular package, so that ``importlib.resources.files`` reads them in every kind of install.
"""
