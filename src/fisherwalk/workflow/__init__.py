"""walk() and what follows it: the planned run, functions of the draws, resume, reopen, hand-
over to BlackJAX, devices.
"""
