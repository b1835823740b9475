"""How a design behaves: closed-loop runs, figures of merit, frequency analysis, advice.

- :mod:`.simulation`: closed-loop runs with events, noise and a true plant;
- :mod:`.performance`: rise, settling, overshoot, IAE, offset; moves per input;
- :mod:`.frequency`: S and T at the plant input and output, peaks, bandwidth, margins;
- :mod:`.advice`: plain-language tuning advice with suggested fixes.
"""
