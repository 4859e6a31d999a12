* CAPCELL: a capacitor C1 that ideal switches connect to VDD (A high) or to VSS (A low), Y = A.
* The switches are complementary around vdd/2 (vdd = 1.2 V in cap_cell.toml) and never on
* together, so the supply only ever charges C1 and the load through S1's 1 kOhm.
.subckt CAPCELL A Y VDD VSS
S1 VDD Y A VSS swcap
S2 Y VSS VDD A swcap
C1 Y VSS 10f
.model swcap sw vt=0.6 vh=0 ron=1k roff=1e15
.ends CAPCELL
