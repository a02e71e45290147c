"""Pure numpy computation: no web framework is imported anywhere below this package.

Vectorisation rule (one rule for the whole core): inputs broadcast against each other by
numpy's rules, vector axes are last, and a scalar in gives a scalar-shaped array out.
Angles on the sky are degrees, parallax mas, proper motion mas/yr (RA component includes
cos(dec)), velocities km/s, distances pc, time spans Julian years, epochs Julian epochs (TDB).
"""
