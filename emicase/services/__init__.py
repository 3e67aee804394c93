"""Every change to emicase's data goes through a function here.

Keyword-only, typed, atomic. Views, serializers and tasks validate their
input and call one service; they never write models themselves.
"""
