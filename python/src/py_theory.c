/* placeholder */
#include "pyclef.h"
PyMethodDef pyclef_theory_methods[] = {{NULL, NULL, 0, NULL}};
