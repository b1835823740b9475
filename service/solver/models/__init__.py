"""Plant model forms and what they are made of.

- :mod:`.sampling`: exact zero-order-hold sampling of continuous state-space models;
- :mod:`.transfer`: transfer matrices with fractional dead times as exact discrete models;
- :mod:`.step_response`: step-response tables as exact state-space models;
- :mod:`.reduction`: balanced truncation of the stable part, with its error bound;
- :mod:`.properties`: steady-state gain, relative gain array, open-loop poles;
- :mod:`.modes`: plant modes no input can move (PBH test);
- :mod:`.scaling`: signal spans, the scaled plant, and gains back in engineering units.
"""
