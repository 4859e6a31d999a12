// A hand-written gate-level netlist using every cell of tests/data/consumers.toml, for
// OpenSTA: a flop with asynchronous reset feeding a plain flop through gates.
module mixed (clk, rst_n, d, e, q, y);
  input clk, rst_n, d, e;
  output q, y;
  wire n1, n2, q1, q1b, n3, n4, n5, q2b;
  QINV_P1 u1 (.A(d), .Y(n1));
  QNAND2_P1 u2 (.IA(n1), .IB(q1), .Y(n2));
  QDFFR_P1 f1 (.D(n2), .CLK(clk), .RSTB(rst_n), .Q(q1), .QB(q1b));
  QBUFC_P1 u3 (.A(q1b), .Y(n3), .YB(n4));
  QAOI21_P1 u4 (.IA(n3), .IB(e), .IC(q2b), .Y(n5));
  QDFF_P1 f2 (.D(n5), .CLK(clk), .Q(q), .QB(q2b));
  QINV_P1 u5 (.A(n4), .Y(y));
endmodule
