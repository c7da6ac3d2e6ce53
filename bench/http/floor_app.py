"""The framework floor for the HTTP benchmark (not part of the service): what one bare Starlette route costs on
the same uvicorn stack, with no scoring.

One route, ``POST /v1/segmentations/{name}/assign``, no middleware: it reads the body, parses it with orjson
as the service does, takes its ``records`` list, and answers one constant result per record in the service's
answer shape (same keys and value types), serialized with orjson. No auth, no checks, no metrics, no request
id, no log: the least a route that parses the same body and answers the same shape can do, so the service's
requests/s as a share of this route's is the share of the framework's limit the service reaches.

    uvicorn floor_app:app --app-dir bench/http
"""

from __future__ import annotations

import orjson
from starlette.applications import Starlette
from starlette.requests import Request
from starlette.responses import Response
from starlette.routing import Route

# One answer item of the service's shape (schemas.AssignResponse), with constant values.
RESULT = {"segment": 0, "label": None, "distance": 1.0, "outlier": False, "outlier_reasons": [], "runner_up": 1,
          "margin": 0.5, "residual": 0.25, "imputed": []}


async def assign(request: Request) -> Response:
    records = orjson.loads(await request.body())["records"]
    body = {"name": request.path_params["name"], "version": 1,
            "results": [{"id": i, **RESULT} for i in range(len(records))], "errors": []}
    return Response(orjson.dumps(body), media_type="application/json")


async def healthz(request: Request) -> Response:
    return Response(b'{"status":"ok"}', media_type="application/json")


app = Starlette(routes=[Route("/v1/segmentations/{name}/assign", assign, methods=["POST"]),
                        Route("/healthz", healthz)])
