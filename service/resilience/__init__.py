"""Staying inside the page budget and surviving faults: circuit breakers, latency estimates, guards."""

from service.resilience.breaker import BreakerState, CircuitBreaker
from service.resilience.guards import Guards
from service.resilience.latency import LatencyWindow

__all__ = ["BreakerState", "CircuitBreaker", "Guards", "LatencyWindow"]
