"""The service's own request pipeline in this process, behind the client's interface.

``local_client()`` returns a :class:`service.client.Client` whose requests never leave the
process: a requests transport adapter hands them to the Flask application (validation,
core computation, CSV and JSON rendering). The command line uses it when no ``--url`` is
given, so computing locally and asking a running service run the same code and give the
same output.
"""

from __future__ import annotations

import requests
from requests.adapters import BaseAdapter
from requests.structures import CaseInsensitiveDict

from .client import Client

#: Base URL of the in-process service (never resolved: the adapter answers it).
LOCAL_URL = "http://skydrift.in-process"


class InProcessAdapter(BaseAdapter):
    """requests transport adapter that answers requests with a WSGI application."""

    def __init__(self, app):
        super().__init__()
        self.app = app
        self.test_client = app.test_client()

    def send(self, request, stream=False, timeout=None, verify=True, cert=None, proxies=None):
        url = requests.utils.urlparse(request.url)
        path = url.path + (f"?{url.query}" if url.query else "")
        body = request.body
        if isinstance(body, str):
            body = body.encode()
        answer = self.test_client.open(
            path,
            method=request.method,
            data=body or b"",
            headers={k: v for k, v in request.headers.items() if k.lower() != "content-length"},
        )
        resp = requests.Response()
        resp.status_code = answer.status_code
        resp.reason = answer.status.partition(" ")[2]
        resp.headers = CaseInsensitiveDict(answer.headers)
        resp._content = answer.get_data()
        resp.encoding = answer.mimetype_params.get("charset")
        resp.url = request.url
        resp.request = request
        return resp

    def close(self):
        pass


def local_client(app=None, **kwargs) -> Client:
    """A Client served by the application in this process (default: settings from env)."""
    if app is None:
        from .api import create_app

        app = create_app()
    session = requests.Session()
    session.mount(LOCAL_URL, InProcessAdapter(app))
    kwargs.setdefault("max_request_line_bytes", None)  # no request line in this process
    return Client(LOCAL_URL, session=session, **kwargs)
