"""The FastAPI application."""

from __future__ import annotations

import asyncio
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.middleware.gzip import GZipMiddleware

from atomq_service.api.admin import router as admin_router
from atomq_service.api.batches import router as batches_router
from atomq_service.api.comparisons import router as comparisons_router
from atomq_service.api.limits import BodySizeLimit, GzipRequest, RateLimit
from atomq_service.api.routes import public_router, router
from atomq_service.db import make_engine
from atomq_service.errors import ApiError
from atomq_service.messaging import Dispatcher
from atomq_service.reconciler import run_forever
from atomq_service.registry import seed_defaults
from atomq_service.schema import prepare_schema
from atomq_service.settings import Settings, get_settings

# Responses from this size on are gzip-compressed for clients that accept it (a structure
# of about 1000 atoms and up, trajectories); level 1: most of the gain, little CPU.
GZIP_MINIMUM_BYTES = 64 * 1024


def create_app(settings: Settings | None = None) -> FastAPI:
    settings = settings or get_settings()
    if settings.database_url is None:
        settings.data_dir.mkdir(parents=True, exist_ok=True)
    engine = make_engine(settings.resolved_database_url)

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        # `atomq serve` upgrades its embedded default before the API starts; the API
        # itself only creates an empty database and refuses one at another revision.
        prepare_schema(engine, settings)
        seed_defaults(engine)
        reconciler = None
        if settings.reconcile_interval_s > 0 and settings.broker_url:
            reconciler = asyncio.create_task(
                run_forever(engine, app.state.dispatcher, settings), name="reconciler"
            )
        yield
        if reconciler is not None:
            reconciler.cancel()
        app.state.dispatcher.close()
        engine.dispose()

    app = FastAPI(
        title="atomq",
        version="1",
        summary="A lab-wide job service for atomistic calculations.",
        description=(
            "Units are ASE's: Angstrom, eV, eV/Angstrom, eV/Angstrom^3. Simulated numbers "
            "need validation before any engineering or safety decision."
        ),
        lifespan=lifespan,
    )
    app.state.settings = settings
    app.state.engine = engine
    app.state.dispatcher = Dispatcher(settings.broker_url or "memory://")
    app.include_router(public_router)
    app.include_router(router)
    app.include_router(admin_router)
    app.include_router(batches_router)
    app.include_router(comparisons_router)
    # Outermost last: the size of what arrives, then the rate, then inflating a gzip
    # body (under the same limit), then compressing large responses for the way back.
    app.add_middleware(GZipMiddleware, minimum_size=GZIP_MINIMUM_BYTES, compresslevel=1)
    app.add_middleware(GzipRequest, max_bytes=settings.max_body_bytes)
    app.add_middleware(RateLimit, per_minute=settings.requests_per_minute)
    app.add_middleware(BodySizeLimit, max_bytes=settings.max_body_bytes)

    @app.exception_handler(ApiError)
    async def _api_error(_request: Request, exc: ApiError) -> JSONResponse:
        return JSONResponse({"detail": exc.message, "code": exc.code}, status_code=exc.status_code)

    @app.exception_handler(StarletteHTTPException)
    async def _http_error(_request: Request, exc: StarletteHTTPException) -> JSONResponse:
        # The framework's own refusals (a body that is not JSON, an unknown route, a wrong
        # method) get the same shape as ours.
        return JSONResponse(
            {"detail": str(exc.detail), "code": f"http_{exc.status_code}"},
            status_code=exc.status_code,
            headers=getattr(exc, "headers", None),
        )

    @app.exception_handler(RequestValidationError)
    async def _invalid(_request: Request, exc: RequestValidationError) -> JSONResponse:
        problems = []
        for error in exc.errors():
            where = ".".join(str(part) for part in error["loc"] if part != "body")
            message = str(error["msg"]).removeprefix("Value error, ")
            problems.append(f"{where}: {message}" if where else message)
        return JSONResponse(
            {"detail": "; ".join(problems), "code": "invalid_input"}, status_code=422
        )

    return app
