"""Capacity: patients who share limited resources (beds, slots, chairs) and arrive over time.

Where the rest of microsim simulates independent patients, here they wait for each other:
`binding` turns a scenario's arrivals and resources into numbers, `arrivals` says who comes
when, `resources` holds the SimPy resources (priority, pre-emption, capacity by period),
`engine` runs the patients as SimPy processes sharing them, `statistics`, `outcomes` and
`warm_up` read what happened, `validation` compares the queues with queueing theory
(`microsim.markov.queues`), `run` does a scenario end to end and `present` prints it.
"""
