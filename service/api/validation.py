"""pydantic ValidationError -> the contract's 422 items."""

from __future__ import annotations

from typing import Any, Iterable

from pydantic import BaseModel, ValidationError

from service.errors import InvalidInput, RecordProblem


def problems_from_pydantic(errors: Iterable[dict[str, Any]], skip_prefix: tuple[str, ...] = ()) -> list[RecordProblem]:
    problems = []
    for error in errors:
        loc = [str(part) for part in error.get("loc", ()) if str(part) not in skip_prefix]
        problems.append(RecordProblem(None, ".".join(loc) or "body", error.get("msg", "invalid value")))
    return problems


def validate_model(model: type[BaseModel], data: Any) -> Any:
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        raise InvalidInput(problems_from_pydantic(exc.errors())) from None
