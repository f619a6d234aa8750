"""rundir"""
