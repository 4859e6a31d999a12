* Inverters with their device bulks on pins of their own, as open cell libraries ship cells:
* VPWR and VGND the supply and ground, VPB the n-well (the PMOS bulk), VNB the p-substrate (the
* NMOS bulk); the pins in the order such a library lists them. Sizes and diffusions as the demo's
* QINV_P1 (charflow/bundled/templates/cells/inv.sp.j2), on the invented vellum90 models.
.subckt INV_B A VGND VNB VPB VPWR Y
MP Y A VPWR VPB pch W=8e-07 L=1e-07 AS=2e-13 AD=2e-13 PS=2.1e-06 PD=2.1e-06
MN Y A VGND VNB nch W=4e-07 L=1e-07 AS=1e-13 AD=1e-13 PS=1.3e-06 PD=1.3e-06
.ends INV_B

* The same inverter again, for a run whose n-well is biased apart from the supply.
.subckt INV_BB A VGND VNB VPB VPWR Y
MP Y A VPWR VPB pch W=8e-07 L=1e-07 AS=2e-13 AD=2e-13 PS=2.1e-06 PD=2.1e-06
MN Y A VGND VNB nch W=4e-07 L=1e-07 AS=1e-13 AD=1e-13 PS=1.3e-06 PD=1.3e-06
.ends INV_BB
