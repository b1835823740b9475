"""movecast: design, check and preview predictive controllers (MPC) as a stateless service.

Layers, each importing only those below it: ``service.cli`` → ``service.api`` →
``service.schemas`` → ``service.solver`` (pure numpy/scipy); ``service.errors`` is shared.
"""

__version__ = "0.1.0"
