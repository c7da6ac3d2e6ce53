"""Drift reports (being built; see issue 4)."""

from fastapi import APIRouter

router = APIRouter(prefix="/segmentations", tags=["drift"])
