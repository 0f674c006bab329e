"""The lab's web application: FastAPI app factory, routers, auth, templates.

The web layer knows nothing of FFTs: it stores files, queues jobs, shows the
reports the worker stored, and records comments and decisions.
"""
