"""The terminal's energy: its battery, its loads, and when it may listen and send.

Sans-I/O like the rest of the core.  :mod:`.battery` integrates the
battery's charge exactly over intervals in which the harvest and the loads
are constant, keeping a ledger that balances; :mod:`.loads` says what each
power state draws; :mod:`.levels` is the one table of degradation (normal,
routine deferred, alarms only) as the state of charge falls and recovers;
:mod:`.duty` holds a transmit duty-cycle limit over a sliding window;
:mod:`.rates` learns the usable-burst rate by hour from what the terminal
heard; :mod:`.scheduler` decides listening windows and whether routine
traffic may go.  Time comes in as ``now``; nothing here reads a clock.
"""
