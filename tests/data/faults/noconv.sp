* NOCONV: Y follows A through 1 kOhm; node Q has a solution at DC with A at either rail,
* but while A is between 0.4 V and 0.8 V its only element asks for a current 1 mA (1 + V²)
* that no voltage gives, so every transient through an input edge fails to converge.
.subckt NOCONV A Y VDD VSS
R1 A Y 1k
Bq Q VSS I = (V(A,VSS) > 0.4 && V(A,VSS) < 0.8) ? 1e-3*(1 + V(Q,VSS)*V(Q,VSS)) : V(Q,VSS)/1k
.ends NOCONV
