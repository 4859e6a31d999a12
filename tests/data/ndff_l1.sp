* The test flop QDFFR_P1 rendered from the demo template (invented), and QNDFFR_P1: the same
* flop clocked on the falling edge of CLKN through an inverter (tests/test_negedge.py).
* QDFFR_P1: positive-edge D flip-flop with active-low reset RSTB (vellum90 demo cell, invented)
.subckt QDFFR_P1 D CLK RSTB Q QB VDD VSS
* local clocks
MPc1 ckn CLK VDD VDD pch W=8e-07 L=1e-07 AS=2e-13 AD=2e-13 PS=2.1e-06 PD=2.1e-06
MNc1 ckn CLK VSS VSS nch W=4e-07 L=1e-07 AS=1e-13 AD=1e-13 PS=1.3e-06 PD=1.3e-06
MPc2 ckp ckn VDD VDD pch W=8e-07 L=1e-07 AS=2e-13 AD=2e-13 PS=2.1e-06 PD=2.1e-06
MNc2 ckp ckn VSS VSS nch W=4e-07 L=1e-07 AS=1e-13 AD=1e-13 PS=1.3e-06 PD=1.3e-06
* master: transparent while CLK is low
MNTm1 D ckn m1 VSS nch W=4e-07 L=1e-07 AS=1e-13 AD=1e-13 PS=1.3e-06 PD=1.3e-06
MPTm1 D ckp m1 VDD pch W=8e-07 L=1e-07 AS=2e-13 AD=2e-13 PS=2.1e-06 PD=2.1e-06
MPAm2 m2 m1 VDD VDD pch W=8e-07 L=1e-07 AS=2e-13 AD=2e-13 PS=2.1e-06 PD=2.1e-06
MPBm2 m2 RSTB VDD VDD pch W=8e-07 L=1e-07 AS=2e-13 AD=2e-13 PS=2.1e-06 PD=2.1e-06
MNAm2 m2 m1 xm2 VSS nch W=8e-07 L=1e-07 AS=2e-13 AD=2e-13 PS=2.1e-06 PD=2.1e-06
MNBm2 xm2 RSTB VSS VSS nch W=8e-07 L=1e-07 AS=2e-13 AD=2e-13 PS=2.1e-06 PD=2.1e-06
MPm3 m3 m2 VDD VDD pch W=8e-07 L=1e-07 AS=2e-13 AD=2e-13 PS=2.1e-06 PD=2.1e-06
MNm3 m3 m2 VSS VSS nch W=4e-07 L=1e-07 AS=1e-13 AD=1e-13 PS=1.3e-06 PD=1.3e-06
MNTm4 m3 ckp m1 VSS nch W=4e-07 L=1e-07 AS=1e-13 AD=1e-13 PS=1.3e-06 PD=1.3e-06
MPTm4 m3 ckn m1 VDD pch W=8e-07 L=1e-07 AS=2e-13 AD=2e-13 PS=2.1e-06 PD=2.1e-06
* slave: transparent while CLK is high
MNTs1 m2 ckp s1 VSS nch W=4e-07 L=1e-07 AS=1e-13 AD=1e-13 PS=1.3e-06 PD=1.3e-06
MPTs1 m2 ckn s1 VDD pch W=8e-07 L=1e-07 AS=2e-13 AD=2e-13 PS=2.1e-06 PD=2.1e-06
MPs2 s2 s1 VDD VDD pch W=8e-07 L=1e-07 AS=2e-13 AD=2e-13 PS=2.1e-06 PD=2.1e-06
MNs2 s2 s1 VSS VSS nch W=4e-07 L=1e-07 AS=1e-13 AD=1e-13 PS=1.3e-06 PD=1.3e-06
MPAs3 s3 s2 VDD VDD pch W=8e-07 L=1e-07 AS=2e-13 AD=2e-13 PS=2.1e-06 PD=2.1e-06
MPBs3 s3 RSTB VDD VDD pch W=8e-07 L=1e-07 AS=2e-13 AD=2e-13 PS=2.1e-06 PD=2.1e-06
MNAs3 s3 s2 xs3 VSS nch W=8e-07 L=1e-07 AS=2e-13 AD=2e-13 PS=2.1e-06 PD=2.1e-06
MNBs3 xs3 RSTB VSS VSS nch W=8e-07 L=1e-07 AS=2e-13 AD=2e-13 PS=2.1e-06 PD=2.1e-06
MNTs4 s3 ckn s1 VSS nch W=4e-07 L=1e-07 AS=1e-13 AD=1e-13 PS=1.3e-06 PD=1.3e-06
MPTs4 s3 ckp s1 VDD pch W=8e-07 L=1e-07 AS=2e-13 AD=2e-13 PS=2.1e-06 PD=2.1e-06
* outputs: Q = D captured, QB driven from Q
MPq Q s1 VDD VDD pch W=8e-07 L=1e-07 AS=2e-13 AD=2e-13 PS=2.1e-06 PD=2.1e-06
MNq Q s1 VSS VSS nch W=4e-07 L=1e-07 AS=1e-13 AD=1e-13 PS=1.3e-06 PD=1.3e-06
MPqn QB Q VDD VDD pch W=8e-07 L=1e-07 AS=2e-13 AD=2e-13 PS=2.1e-06 PD=2.1e-06
MNqn QB Q VSS VSS nch W=4e-07 L=1e-07 AS=1e-13 AD=1e-13 PS=1.3e-06 PD=1.3e-06
.ends QDFFR_P1

* QNDFFR_P1: the same flop clocked on CLKN's falling edge through an inverter (test only)
.subckt QNDFFR_P1 D CLKN RSTB Q QB VDD VSS
MPI ckp CLKN VDD VDD pch W=0.8u L=0.1u
MNI ckp CLKN VSS VSS nch W=0.4u L=0.1u
X1 D ckp RSTB Q QB VDD VSS QDFFR_P1
.ends
