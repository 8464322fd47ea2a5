"""The HTTP surface: the app factory, routes, request and reply schemas, problem+json, middleware, page."""
