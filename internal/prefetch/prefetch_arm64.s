#include "textflag.h"

// func lineAt(a uintptr)
TEXT ·lineAt(SB), NOSPLIT|NOFRAME, $0-8
	MOVD a+0(FP), R0
	PRFM (R0), PLDL1KEEP
	RET
