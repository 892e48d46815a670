"""Small test helpers: convert reference model dicts to kalmax models; central differences."""

import numpy as np

import kalmax as kx


def to_model(md, dtype=np.float64, prior=True):
    """A kalmax.StateSpace from a tests/reference.py model dict."""
    cast = lambda a: None if a is None else np.asarray(a, dtype)  # noqa: E731
    has_prior = prior and md.get("P0") is not None
    return kx.StateSpace(
        A=cast(md["A"]), C=cast(md["C"]), Q=cast(md["Q"]), R=cast(md["R"]),
        b=cast(md.get("b")), d=cast(md.get("d")),
        x0_mean=cast(md.get("m0")) if has_prior else None,
        x0_cov=cast(md.get("P0")) if has_prior else None,
    )


def to_dict(model):
    """The reference model dict of a kalmax.StateSpace."""
    g = lambda a: None if a is None else np.asarray(a, np.float64)  # noqa: E731
    return dict(A=g(model.A), C=g(model.C), Q=g(model.Q), R=g(model.R), b=g(model.b),
                d=g(model.d), m0=g(model.x0_mean), P0=g(model.x0_cov))


def central_differences(f, v, h=1e-6):
    """Gradient of a scalar NumPy function of an array by central differences (common practice)."""
    v = np.asarray(v, np.float64)
    g = np.zeros(v.shape)
    for i in np.ndindex(v.shape):
        e = np.zeros(v.shape)
        e[i] = h
        g[i] = (f(v + e) - f(v - e)) / (2 * h)
    return g


SYMMETRIC_FIELDS = ("Q", "R", "P0")


def field_difference(loss, md, field, idx, h=1e-6):
    """Central difference of ``loss(model dict)`` along one entry of ``md[field]`` (common practice).

    For the symmetric fields (Q, R, P0) the entry and its mirror move
    together, so the perturbed matrix stays symmetric. Returns the difference
    quotient and the direction E, so that a gradient g is compared as Σ g·E.
    """
    E = np.zeros_like(md[field])
    E[idx] = 1.0
    if field in SYMMETRIC_FIELDS:
        E[tuple(idx[::-1])] = 1.0
    up = loss(dict(md, **{field: md[field] + h * E}))
    down = loss(dict(md, **{field: md[field] - h * E}))
    return (up - down) / (2 * h), E
