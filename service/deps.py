"""FastAPI dependencies: settings and the loaded engine, taken from the app state."""

from __future__ import annotations

from typing import Annotated

from fastapi import Depends, HTTPException, Request
from sounding.indexer.search import Searcher

from .engine import Engine
from .settings import ServiceSettings


def get_settings(request: Request) -> ServiceSettings:
    return request.app.state.settings


def get_engine(request: Request) -> Engine:
    return request.app.state.engine


def get_searcher(request: Request) -> Searcher:
    """The current searcher, or 503 with the reason when no index is loaded."""
    engine: Engine = request.app.state.engine
    searcher = engine.current()
    if searcher is None:
        raise HTTPException(
            status_code=503,
            detail=f"no index is loaded: {engine.error or 'unknown reason'}; "
            "build one with `sounding index PATH`",
        )
    return searcher


SettingsDep = Annotated[ServiceSettings, Depends(get_settings)]
EngineDep = Annotated[Engine, Depends(get_engine)]
SearcherDep = Annotated[Searcher, Depends(get_searcher)]
