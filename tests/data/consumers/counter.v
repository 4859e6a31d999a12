// A 4-bit counter with an asynchronous active-low reset and a registered enable:
// a small design for the consumer tests (yosys synthesis onto a charflow library).
module counter (
    input  wire       clk,
    input  wire       rst_n,
    input  wire       en,
    output reg  [3:0] count,
    output reg        en_q
);
  always @(posedge clk or negedge rst_n)
    if (!rst_n) count <= 4'd0;
    else if (en_q) count <= count + 4'd1;

  // A register with no reset, for the library's plain flip-flop.
  always @(posedge clk) en_q <= en;
endmodule
