"""placeholder"""
def laplace_log_likelihood(*a, **k):
    raise NotImplementedError
