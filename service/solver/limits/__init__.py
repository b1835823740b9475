"""Process limits (on inputs, moves and outputs) and the move QP that respects them.

- :mod:`.bounds`: the limits as arrays (inf where absent);
- :mod:`.zones`: outputs held in a range (weighted only outside it), and how a run kept them;
- :mod:`.qp`: the move QP under limits (DAQP), set up once and solved every step;
- :mod:`.policy`: the QP as the simulation's move policy, with per-step reports;
- :mod:`.reachable_target`: the nearest steady state reachable inside the input limits;
- :mod:`.limited_run`: a run under limits, and the fixed law's nominal step against them.
"""
