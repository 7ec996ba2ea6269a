"""HTTP handlers: the board API, the admin API, auth, middlewares, the OpenAPI document."""
