"""The Python client of the segscore API (``from segscore.client import Client`` is the short import).

    with Client("http://127.0.0.1:8000", key="...") as api:
        report = api.fit("shop", "customers.csv", id_column="customer_id", k=(2, 8))
        tagged = api.assign("shop", frame)            # frame + segment, label, distance, outlier, ...

Synchronous; errors are ``SegscoreError`` subclasses (the tree is drawn in ``service.client._errors``).
No server code is imported: the client needs httpx2 and pandas only.
"""

from service.client._client import (
    ASSIGN_BATCH_ROWS,
    DEFAULT_URL,
    KEY_VARIABLE,
    RESULT_COLUMNS,
    URL_VARIABLE,
    Client,
)
from service.client._errors import (
    ApiError,
    BadFile,
    BadRequest,
    BodyTimeout,
    Conflict,
    Forbidden,
    InvalidInput,
    JobFailed,
    LocalInputError,
    NotFound,
    PayloadTooLarge,
    SegscoreError,
    ServerError,
    ServerUnreachable,
    Unauthorized,
    UnexpectedResponse,
    UnsupportedMediaType,
)

__all__ = [
    "ASSIGN_BATCH_ROWS", "DEFAULT_URL", "KEY_VARIABLE", "RESULT_COLUMNS", "URL_VARIABLE", "ApiError", "BadFile",
    "BadRequest", "BodyTimeout", "Client", "Conflict", "Forbidden", "InvalidInput", "JobFailed", "LocalInputError", "NotFound",
    "PayloadTooLarge", "SegscoreError", "ServerError", "ServerUnreachable", "Unauthorized", "UnexpectedResponse",
    "UnsupportedMediaType",
]
