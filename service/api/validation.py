"""pydantic ValidationError -> the contract's 422 items."""

from __future__ import annotations

from typing import Any, Iterable

from pydantic import BaseModel, ValidationError

from service.errors import InvalidInput, RecordProblem


_UNION_TAGS = frozenset({"int", "float", "bool", "str", "none", "KRange", "list[str]"})


def problems_from_pydantic(errors: Iterable[dict[str, Any]], skip_prefix: tuple[str, ...] = ()) -> list[RecordProblem]:
    problems = []
    for error in errors:
        # Drop pydantic's internal location parts (union member tags such as "int" or
        # "function-after[...]") so that the field reads as the client wrote it: "k", "k.min".
        loc = [str(part) for part in error.get("loc", ())
               if str(part) not in skip_prefix and "[" not in str(part) and str(part) not in _UNION_TAGS]
        problems.append(RecordProblem(None, ".".join(loc) or "body", error.get("msg", "invalid value")))
    return problems


def validate_model(model: type[BaseModel], data: Any) -> Any:
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        raise InvalidInput(problems_from_pydantic(exc.errors())) from None
