/* placeholder */
#include "pyclef.h"
PyMethodDef pyclef_sim_methods[] = {{NULL, NULL, 0, NULL}};
