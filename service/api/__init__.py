"""HTTP only: routers, request/response schemas, dependencies and the error handler."""
