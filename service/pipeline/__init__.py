"""The application layer: per endpoint or block, check the request, compute, answer.

Each module offers ``check_* -> *Inputs`` (every rule that needs several fields or the
caps, with errors naming the field by JSON pointer), ``compute_* -> *Outcome`` (the solver
on arrays) and ``*_response`` (the response model).  It imports :mod:`service.schemas` and
:mod:`service.solver`; :mod:`service.api` and :mod:`service.cli` import it.
"""
