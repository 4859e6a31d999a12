* CAPPIN: an inverter of ideal switches (Y = !A) whose input carries only linear capacitors:
* CA from A to VSS and CM from A to Y. A switch's control draws no current, so the charge A
* draws on an edge is CA·vdd + CM·2·vdd (Y swings the other way): 4 fF on either edge.
.subckt CAPPIN A Y VDD VSS
S1 VDD Y VDD A swcap
S2 Y VSS A VSS swcap
C1 Y VSS 10f
CA A VSS 2f
CM A Y 1f
.model swcap sw vt=0.6 vh=0 ron=1k roff=1e15
.ends CAPPIN
